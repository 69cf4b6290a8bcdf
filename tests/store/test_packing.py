"""Histogram blobs of rollup rows: the sparse form round-trips, the dense form still reads."""

from __future__ import annotations

import numpy as np
import pytest

from belated.stats.delays import N_DELAY_BINS
from belated.stats.ranking import N_BINS
from belated.store.packing import pack_delays, pack_hist, unpack_delays, unpack_hist


def _hist(seed: int, filled: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    counts = np.zeros(3 * N_BINS, np.int64)
    cells = rng.choice(3 * N_BINS, filled, replace=False)
    counts[cells] = rng.integers(1, 2**40, filled)
    sums = np.where(counts > 0, rng.random(3 * N_BINS) * counts, 0.0)
    return counts.reshape(3, N_BINS), sums.reshape(3, N_BINS)


@pytest.mark.parametrize("filled", [0, 1, 37, 300])
def test_sparse_histograms_round_trip_exactly(filled: int) -> None:
    counts, sums = _hist(filled, filled)
    blob = pack_hist(counts, sums)
    assert len(blob) == 3 + 18 * filled  # a fifth of the dense 4,800 bytes at 53 cells
    got_counts, got_sums = unpack_hist(blob)
    assert np.array_equal(got_counts, counts) and np.array_equal(got_sums, sums)
    delays = np.zeros(N_DELAY_BINS, np.int64)
    delays[:filled] = np.arange(1, filled + 1)
    assert np.array_equal(unpack_delays(pack_delays(delays)), delays)


def test_dense_blobs_written_before_still_read() -> None:
    counts, sums = _hist(3, 50)
    counts[0, 0] = 115  # a first byte equal to the sparse marker does not confuse the reader
    dense = counts.astype("<i8").tobytes() + sums.astype("<f8").tobytes()
    got_counts, got_sums = unpack_hist(dense)
    assert np.array_equal(got_counts, counts) and np.array_equal(got_sums, sums)
    delays = np.arange(N_DELAY_BINS, dtype=np.int64)
    assert np.array_equal(unpack_delays(delays.astype("<i8").tobytes()), delays)


def test_truncated_blobs_are_refused() -> None:
    blob = pack_hist(*_hist(4, 10))
    with pytest.raises(ValueError):
        unpack_hist(blob[:-1])
    with pytest.raises(ValueError):
        unpack_delays(b"x" * 17)


def test_a_cell_index_out_of_range_is_refused() -> None:
    blob = bytearray(pack_hist(*_hist(5, 2)))
    blob[3:5] = (3 * N_BINS).to_bytes(2, "little")  # the first index, one past the last cell
    with pytest.raises(ValueError):
        unpack_hist(bytes(blob))
