"""Pack and unpack the histogram blobs of a rollup row (one per declared `Histogram`).

A blob holds a histogram's int64 counts and, for histograms that keep them, its float64
score sums, over the flattened cells of its shape. Little-endian on every machine.

Blobs are written sparse: a marker byte b"s", the number k of non-empty cells (uint16), then
their flat indexes (uint16[k]) and counts (int64[k]), then the sums (float64[k]) if kept.
An hour of one segment fills a few dozen of the 300 score cells, so this is a fifth of the
dense size or less. Dense blobs (all counts, then all sums: 4,800 bytes for the score
histogram, 3,696 for the delays), written before, still read: the length tells the format,
since a dense length is never 3 + 18k (or 3 + 10k).
"""

from __future__ import annotations

import numpy as np

from belated.store.statistics import HISTOGRAM_BY_NAME, Histogram

_SPARSE = b"s"
_HEAD = 3  # the marker and the cell count


def _sparse_head(k: int) -> bytes:
    return _SPARSE + int(k).to_bytes(2, "little")


def pack(counts: np.ndarray, sums: np.ndarray | None = None) -> bytes:
    """Counts (and score sums) of any shape → a sparse blob."""
    c = np.asarray(counts).reshape(-1)
    nonzero = c != 0
    if sums is not None:
        s = np.asarray(sums).reshape(-1)
        nonzero |= s != 0
    idx = np.flatnonzero(nonzero)
    blob = _sparse_head(idx.size) + idx.astype("<u2").tobytes() + c[idx].astype("<i8").tobytes()
    if sums is not None:
        blob += s[idx].astype("<f8").tobytes()
    return blob


def unpack(hist: Histogram, blob: bytes | None) -> tuple[np.ndarray, np.ndarray | None]:
    """A blob of `hist` → (counts int64, sums float64 or None) in the histogram's shape;
    zeros for None. A blob of the wrong length or with a cell out of range is refused."""
    n = hist.n_cells
    counts = np.zeros(n, np.int64)
    sums = np.zeros(n, np.float64) if hist.score_sums else None
    if blob:
        _fill(hist, bytes(blob), counts, sums)
    return counts.reshape(hist.shape), None if sums is None else sums.reshape(hist.shape)


def _fill(hist: Histogram, blob: bytes, counts: np.ndarray, sums: np.ndarray | None) -> None:
    n, per_cell = hist.n_cells, 8 * (2 if sums is not None else 1)
    if len(blob) == n * per_cell:  # dense, written before the sparse form
        counts[:] = np.frombuffer(blob, "<i8", n, 0)
        if sums is not None:
            sums[:] = np.frombuffer(blob, "<f8", n, 8 * n)
        return
    k = int.from_bytes(blob[1:_HEAD], "little") if len(blob) >= _HEAD else -1
    if blob[:1] != _SPARSE or len(blob) != _HEAD + (2 + per_cell) * k:
        raise ValueError(f"corrupt {hist.name} blob")
    idx = np.frombuffer(blob, "<u2", k, _HEAD)
    if k and int(idx.max()) >= n:
        raise ValueError(f"corrupt {hist.name} blob")
    counts[idx] = np.frombuffer(blob, "<i8", k, _HEAD + 2 * k)
    if sums is not None:
        sums[idx] = np.frombuffer(blob, "<f8", k, _HEAD + 10 * k)


_SCORES = HISTOGRAM_BY_NAME["hist"]
_DELAYS = HISTOGRAM_BY_NAME["delays"]


def pack_hist(counts: np.ndarray, sums: np.ndarray) -> bytes:
    """The score histogram: counts int[3, N_BINS], sums float[3, N_BINS] → bytes (sparse)."""
    return pack(counts, sums)


def unpack_hist(blob: bytes | None) -> tuple[np.ndarray, np.ndarray]:
    """bytes → the score histogram's (counts int64[3, N_BINS], sums float64[3, N_BINS])."""
    counts, sums = unpack(_SCORES, blob)
    assert sums is not None
    return counts, sums


def pack_delays(hist: np.ndarray) -> bytes:
    """The label-delay histogram int[N_DELAY_BINS] → bytes (sparse)."""
    return pack(hist)


def unpack_delays(blob: bytes | None) -> np.ndarray:
    """bytes → the label-delay histogram int64[N_DELAY_BINS]; zeros for None."""
    return unpack(_DELAYS, blob)[0]
