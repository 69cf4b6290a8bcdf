"""The declared rollup statistics: the table, the COPY types, the blobs and the measures'
input follow the declaration (tests/metrics/test_declared_histograms.py checks a declared
histogram against numpy on both stores)."""

from __future__ import annotations

import dataclasses

import numpy as np
from sqlalchemy import BigInteger, Float, LargeBinary

from belated.stats.window import WindowStats
from belated.store import packing
from belated.store.rollup_tables import Rollup
from belated.store.statistics import (
    COUNTS,
    HISTOGRAMS,
    SCALARS,
    SUMS,
    pg_types,
)
from belated.store.totals import Totals


def test_every_declared_statistic_has_its_column_and_copy_type() -> None:
    columns = Rollup.__table__.c
    for s in SCALARS:
        want = BigInteger if s.name in COUNTS else Float
        assert isinstance(columns[s.name].type, want) and not columns[s.name].nullable
    for h in HISTOGRAMS:
        assert isinstance(columns[h.name].type, LargeBinary) and columns[h.name].nullable
    assert set(pg_types()) == {c.name for c in columns}
    assert len(COUNTS) + len(SUMS) == len(SCALARS)


def test_the_measures_input_takes_every_declared_scalar_by_name() -> None:
    fields = {f.name for f in dataclasses.fields(WindowStats)}
    assert {s.name for s in SCALARS} <= fields
    values = {s.name: i + 1 for i, s in enumerate(SCALARS)}
    got = Totals.of(values)
    assert {name: got[name] for name in values} == values


def test_blobs_of_every_histogram_round_trip() -> None:
    rng = np.random.default_rng(4)
    for h in HISTOGRAMS:
        counts = rng.integers(0, 3, h.shape).astype(np.int64)
        sums = rng.random(h.shape) * counts if h.score_sums else None
        got_counts, got_sums = packing.unpack(h, packing.pack(counts, sums))
        assert np.array_equal(got_counts, counts)
        assert (got_sums is None) == (sums is None)
        if sums is not None:
            assert np.array_equal(got_sums, sums)
