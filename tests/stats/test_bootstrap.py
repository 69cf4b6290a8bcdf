"""Seeded, vectorised bootstrap of confusion counts (belated/stats/bootstrap.py)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from belated.stats import measures
from belated.stats.bootstrap import (
    MAX_RESAMPLES,
    binary_arrays,
    bootstrap_binary,
    check_resamples,
    percentile_interval,
)


def test_same_counts_and_seed_give_the_same_interval() -> None:
    first = bootstrap_binary(40, 10, 15, 200, beta=1.0, confidence=0.95, seed=3)
    again = bootstrap_binary(40, 10, 15, 200, beta=1.0, confidence=0.95, seed=3)
    assert first == again
    other_seed = bootstrap_binary(40, 10, 15, 200, beta=1.0, confidence=0.95, seed=4)
    assert other_seed != first
    other_counts = bootstrap_binary(40, 10, 16, 200, beta=1.0, confidence=0.95, seed=3)
    assert other_counts != first


def test_resample_count_limits() -> None:
    assert check_resamples(MAX_RESAMPLES) == 10_000
    bad_values: list[Any] = [-1, MAX_RESAMPLES + 1, 2.5, True]
    for bad in bad_values:
        with pytest.raises(ValueError):
            check_resamples(bad)
    assert bootstrap_binary(4, 1, 1, 4, beta=1.0, confidence=0.9, resamples=0) == {
        "fbeta": None, "mcc": None, "balanced_accuracy": None,
    }  # fmt: skip


def test_more_resamples_give_a_stable_interval() -> None:
    a = bootstrap_binary(400, 100, 150, 2000, beta=1.0, confidence=0.95, resamples=10_000, seed=1)
    b = bootstrap_binary(400, 100, 150, 2000, beta=1.0, confidence=0.95, resamples=10_000, seed=2)
    assert a["fbeta"] == pytest.approx(b["fbeta"], abs=0.005)


def test_vectorised_measures_equal_the_scalar_ones() -> None:
    rng = np.random.default_rng(6)
    cells = rng.integers(0, 4, size=(500, 4)).astype(np.float64)
    arrays = binary_arrays(cells[:, 0], cells[:, 1], cells[:, 2], cells[:, 3], 2.0)
    for i, (tp, fp, fn, tn) in enumerate(cells.astype(int).tolist()):
        for name, scalar in [
            ("fbeta", measures.fbeta_value(tp, fp, fn, 2.0)),
            ("mcc", measures.mcc(tp, fp, fn, tn)),
            ("balanced_accuracy", measures.balanced_accuracy(tp, fp, fn, tn)),
        ]:
            if scalar.value is None:
                assert np.isnan(arrays[name][i]), (name, tp, fp, fn, tn)
            else:
                assert arrays[name][i] == pytest.approx(scalar.value, rel=1e-12, abs=1e-15)


def test_percentile_interval_is_numpys_linear_quantile_over_finite_samples() -> None:
    rng = np.random.default_rng(7)
    samples = rng.normal(size=201)
    expected = np.quantile(samples, [0.05, 0.95])
    assert percentile_interval(samples.copy(), 0.9) == pytest.approx(tuple(expected), rel=1e-12)
    with_nan = np.r_[samples, np.nan, np.inf]
    assert percentile_interval(with_nan, 0.9) == pytest.approx(tuple(expected), rel=1e-12)
    assert percentile_interval(np.full(5, np.nan), 0.9) is None


@settings(max_examples=150, deadline=None)
@given(
    st.tuples(*[st.integers(0, 500)] * 4).filter(lambda c: sum(c) > 0),
    st.floats(0.5, 0.99),
    st.integers(0, 2**32),
)
def test_bootstrap_intervals_stay_in_range(counts, confidence: float, seed: int) -> None:
    got = bootstrap_binary(*counts, beta=1.0, confidence=confidence, resamples=100, seed=seed)
    for name, (lo_bound, hi_bound) in {"fbeta": (0, 1), "balanced_accuracy": (0, 1),
                                       "mcc": (-1, 1)}.items():  # fmt: skip
        interval = got[name]
        if interval is not None:
            low, high = interval
            assert lo_bound - 1e-12 <= low <= high <= hi_bound + 1e-12


def test_bootstrap_interval_covers_the_population_fbeta_about_as_promised() -> None:
    # Seeded simulation: windows of 400 labelled predictions drawn from fixed cell
    # probabilities; the 90% percentile interval should cover the population F1 roughly
    # 90% of the time (a loose band: the percentile bootstrap is only approximately exact).
    rng = np.random.default_rng(2001)
    cells = np.array([0.12, 0.05, 0.08, 0.75])
    truth = 2 * cells[0] / (2 * cells[0] + cells[1] + cells[2])
    hits = 0
    trials = 300
    for seed in range(trials):
        tp, fp, fn, tn = rng.multinomial(400, cells).tolist()
        interval = bootstrap_binary(tp, fp, fn, tn, beta=1.0, confidence=0.9, seed=seed)["fbeta"]
        assert interval is not None
        low, high = interval
        hits += low <= truth <= high
    assert 0.84 <= hits / trials <= 0.95
