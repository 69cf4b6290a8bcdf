"""Sufficient statistics that merge by addition (belated/stats/window.py)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from belated.stats.summary import summarise
from belated.stats.window import WindowStats

from .builders import random_rows

Row = tuple[float, bool, int | None, bool, float | None]

row_strategy = st.tuples(
    st.floats(0.0, 1.0),
    st.booleans(),
    st.sampled_from([None, 0, 1]),
    st.booleans(),
    st.one_of(st.none(), st.floats(-2.0, 20_000.0)),
).map(lambda r: (r[0], r[1], r[2], r[3] and r[2] != 1, r[4]))


def _stats(rows: list[Row]) -> WindowStats:
    if not rows:
        return WindowStats.from_rows([], [], [], [], [])
    scores, flagged, actual, implied, delays = zip(*rows, strict=True)
    return WindowStats.from_rows(scores, flagged, actual, implied, delays)


def test_from_rows_counts_a_small_window_by_hand() -> None:
    stats = WindowStats.from_rows(
        scores=[0.9, 0.8, 0.3, 0.2, 0.7, 0.1, 0.6],
        predicted_pos=[True, True, False, False, True, False, True],
        actual=[1, 0, 1, 0, None, None, None],
        implied=[False, False, False, False, False, True, False],
        delays_hours=[2.5, 30.0, 100.0, None, None, 720.0, None],
    )
    assert (stats.tp, stats.fp, stats.fn, stats.tn) == (1, 1, 1, 2)  # implied row is a TN
    assert (stats.n_pred, stats.n_labelled, stats.n_implied, stats.n_pred_pos) == (7, 5, 1, 4)
    assert (stats.u_p, stats.u_n) == (2, 0)
    assert stats.exp_tp == pytest.approx(0.9 + 0.8 + 0.7 + 0.6)
    assert stats.exp_fn == pytest.approx(0.3 + 0.2 + 0.1)
    assert stats.brier_sum == pytest.approx(0.01 + 0.64 + 0.49 + 0.04 + 0.01)
    assert stats.hist_pos[90] == 1 and stats.hist_pos[30] == 1
    assert stats.hist_neg[[80, 20, 10]].tolist() == [1, 1, 1]
    assert stats.hist_all.sum() == 7 and stats.ssum_all[70] == pytest.approx(0.7)
    assert stats.delay_hist.sum() == 4 and stats.delay_hist[2] == 1 and stats.delay_hist[30] == 1


def test_from_rows_refuses_bad_rows() -> None:
    with pytest.raises(ValueError):
        WindowStats.from_rows([1.2], [True], [1])
    with pytest.raises(ValueError):
        WindowStats.from_rows([0.5], [True], [1], implied=[True])
    with pytest.raises(ValueError):
        WindowStats.from_rows([0.5, 0.4], [True], [1, 0])
    with pytest.raises(ValueError):
        WindowStats.from_rows([0.5], [True], [2])


def test_empty_is_the_identity_and_merging_leaves_inputs_alone() -> None:
    rng = np.random.default_rng(4)
    stats = WindowStats.from_rows(**random_rows(rng, 500))
    before = stats.hist_all.copy()
    merged = stats + WindowStats.empty()
    assert merged.isclose(stats, rel=0.0)
    assert np.array_equal(stats.hist_all, before)
    assert merged.hist_all is not stats.hist_all
    assert WindowStats.empty().isclose(_stats([]), rel=0.0)


@settings(max_examples=60, deadline=None)
@given(st.lists(row_strategy, max_size=40), st.lists(row_strategy, max_size=40))
def test_merging_then_measuring_equals_measuring_the_concatenation(
    left: list[Row], right: list[Row]
) -> None:
    merged = _stats(left).merge(_stats(right))
    together = _stats(left + right)
    assert merged.isclose(together, rel=1e-9)
    a = summarise(merged, resamples=50)
    b = summarise(together, resamples=50)
    assert a["confusion"] == b["confusion"]
    assert a["bounds"] == b["bounds"]
    for name, value in a["measures"].items():
        other = b["measures"][name]
        assert value.keys() == other.keys()
        for key in ("value", "low", "high"):
            if value[key] is None:
                assert other[key] is None, (name, key)
            else:
                assert value[key] == pytest.approx(other[key], rel=1e-9, abs=1e-12), (name, key)


def test_merging_many_seeded_windows() -> None:
    rng = np.random.default_rng(5)
    parts = [random_rows(rng, int(n)) for n in rng.integers(50, 400, size=24)]
    total = WindowStats.empty()
    for part in parts:
        total = total + WindowStats.from_rows(**part)
    concatenated = {
        key: np.concatenate([np.asarray(p[key], dtype=object if key == "actual" else None)
                             for p in parts])
        for key in parts[0]
    }  # fmt: skip
    assert total.isclose(WindowStats.from_rows(**concatenated), rel=1e-9)
    assert total.n_pred == sum(len(p["scores"]) for p in parts)
