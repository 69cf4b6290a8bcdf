"""Pack and unpack the histogram arrays of a rollup row.

`hist` holds int64 counts[3, 100] then float64 score sums[3, 100]; the three rows are the
actual classes positive, negative (explicit or implied) and unlabelled. `delays` holds the
int64 label-delay histogram over belated.stats.delays' bins. Little-endian on every machine.
"""

from __future__ import annotations

import numpy as np

from belated.stats.delays import N_DELAY_BINS

N_BINS = 100
CLASSES = ("pos", "neg", "unl")
_HIST_BYTES = 3 * N_BINS * 8 * 2


def pack_hist(counts: np.ndarray, sums: np.ndarray) -> bytes:
    """counts int[3,100], sums float[3,100] → bytes."""
    return counts.astype("<i8").tobytes() + sums.astype("<f8").tobytes()


def unpack_hist(blob: bytes | None) -> tuple[np.ndarray, np.ndarray]:
    """bytes → (counts int64[3,100], sums float64[3,100]); zeros for None."""
    if not blob:
        return np.zeros((3, N_BINS), np.int64), np.zeros((3, N_BINS), np.float64)
    if len(blob) != _HIST_BYTES:
        raise ValueError("corrupt histogram blob")
    half = _HIST_BYTES // 2
    counts = np.frombuffer(blob[:half], dtype="<i8").reshape(3, N_BINS).astype(np.int64)
    sums = np.frombuffer(blob[half:], dtype="<f8").reshape(3, N_BINS).astype(np.float64)
    return counts, sums


def pack_delays(hist: np.ndarray) -> bytes:
    """int[N_DELAY_BINS] → bytes."""
    return hist.astype("<i8").tobytes()


def unpack_delays(blob: bytes | None) -> np.ndarray:
    """bytes → int64[N_DELAY_BINS]; zeros for None."""
    if not blob:
        return np.zeros(N_DELAY_BINS, np.int64)
    return np.frombuffer(blob, dtype="<i8").astype(np.int64)
