"""Pack and unpack the histogram arrays of a rollup row.

`hist` holds int64 counts[3, 100] and float64 score sums[3, 100]; the three rows are the
actual classes positive, negative (explicit or implied) and unlabelled. `delays` holds the
int64 label-delay histogram over belated.stats.delays' bins. Little-endian on every machine.

Both are written sparse: a marker byte b"s", the number k of non-empty cells (uint16), then
their flat indexes (uint16[k]) and values (int64[k], and for `hist` float64[k]). An hour
of one segment fills a few dozen of the 300 histogram cells, so this is a fifth of the dense
size or less. Dense blobs (exactly 4,800 or 3,696 bytes, written before) still read.
"""

from __future__ import annotations

import numpy as np

from belated.stats.delays import N_DELAY_BINS

N_BINS = 100
CLASSES = ("pos", "neg", "unl")
_HIST_BYTES = 3 * N_BINS * 8 * 2
_SPARSE = b"s"


def _head(k: int) -> bytes:
    return _SPARSE + int(k).to_bytes(2, "little")


def pack_hist(counts: np.ndarray, sums: np.ndarray) -> bytes:
    """counts int[3,100], sums float[3,100] → bytes (sparse)."""
    c = np.asarray(counts).reshape(-1)
    s = np.asarray(sums).reshape(-1)
    idx = np.flatnonzero((c != 0) | (s != 0))
    return (
        _head(idx.size)
        + idx.astype("<u2").tobytes()
        + c[idx].astype("<i8").tobytes()
        + s[idx].astype("<f8").tobytes()
    )


def unpack_hist(blob: bytes | None) -> tuple[np.ndarray, np.ndarray]:
    """bytes → (counts int64[3,100], sums float64[3,100]); zeros for None."""
    counts = np.zeros(3 * N_BINS, np.int64)
    sums = np.zeros(3 * N_BINS, np.float64)
    if not blob:
        return counts.reshape(3, N_BINS), sums.reshape(3, N_BINS)
    blob = bytes(blob)
    if len(blob) != _HIST_BYTES:  # 4,800 is never 3 + 18k: the length tells the format
        k = int(np.frombuffer(blob, "<u2", 1, 1)[0]) if len(blob) >= 3 else -1
        if blob[:1] != _SPARSE or len(blob) != 3 + 18 * k:
            raise ValueError("corrupt histogram blob")
        idx = np.frombuffer(blob, "<u2", k, 3)
        if k and int(idx.max()) >= 3 * N_BINS:
            raise ValueError("corrupt histogram blob")
        counts[idx] = np.frombuffer(blob, "<i8", k, 3 + 2 * k)
        sums[idx] = np.frombuffer(blob, "<f8", k, 3 + 10 * k)
        return counts.reshape(3, N_BINS), sums.reshape(3, N_BINS)
    half = _HIST_BYTES // 2
    dense_counts = np.frombuffer(blob[:half], dtype="<i8").reshape(3, N_BINS).astype(np.int64)
    dense_sums = np.frombuffer(blob[half:], dtype="<f8").reshape(3, N_BINS).astype(np.float64)
    return dense_counts, dense_sums


def pack_delays(hist: np.ndarray) -> bytes:
    """int[N_DELAY_BINS] → bytes (sparse)."""
    h = np.asarray(hist).reshape(-1)
    idx = np.flatnonzero(h)
    return _head(idx.size) + idx.astype("<u2").tobytes() + h[idx].astype("<i8").tobytes()


def unpack_delays(blob: bytes | None) -> np.ndarray:
    """bytes → int64[N_DELAY_BINS]; zeros for None."""
    out = np.zeros(N_DELAY_BINS, np.int64)
    if not blob:
        return out
    blob = bytes(blob)
    if len(blob) != N_DELAY_BINS * 8:  # 3,696 is never 3 + 10k
        k = int(np.frombuffer(blob, "<u2", 1, 1)[0]) if len(blob) >= 3 else -1
        if blob[:1] != _SPARSE or len(blob) != 3 + 10 * k:
            raise ValueError("corrupt delay histogram blob")
        idx = np.frombuffer(blob, "<u2", k, 3)
        if k and int(idx.max()) >= N_DELAY_BINS:
            raise ValueError("corrupt delay histogram blob")
        out[idx] = np.frombuffer(blob, "<i8", k, 3 + 2 * k)
        return out
    return np.frombuffer(blob, dtype="<i8").astype(np.int64)
