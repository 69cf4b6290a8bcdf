"""Delay bins and Kaplan-Meier quantiles (belated/stats/delays.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from belated.stats.delays import (
    DELAY_EDGES_HOURS,
    N_DELAY_BINS,
    delay_bin,
    delay_bins,
    delay_histogram,
    km_quantiles,
)


def sql_case_bin(h: float) -> int:
    """The store's CASE expression, transcribed: the contract delay_bin must keep."""
    h = max(h, 0.0)
    if h < 48:
        return math.floor(h)
    if h < 168:
        return 48 + math.floor((h - 48) / 6)
    return min(68 + math.floor((h - 168) / 24), 461)


def test_edges_layout() -> None:
    edges = DELAY_EDGES_HOURS
    assert edges[:49] == tuple(float(h) for h in range(49))
    assert edges[48:69] == tuple(float(h) for h in range(48, 169, 6))
    assert edges[68] == 168.0 and edges[-2] == 400 * 24.0 and edges[-1] == math.inf
    assert all(b - a == 24 for a, b in zip(edges[68:-2], edges[69:-1], strict=True))
    assert N_DELAY_BINS == len(edges) - 1 == 462


def test_delay_bin_follows_the_sql_formula_and_the_edges() -> None:
    rng = np.random.default_rng(3)
    hours = np.r_[
        [0.0, 0.5, 1.0, 47.999, 48.0, 53.9, 54.0, 167.9, 168.0, 191.9, 192.0, 9599.9, 9600.0],
        [1e6, -3.0],
        rng.uniform(0, 12000, 2000),
    ]
    for h in hours:
        b = delay_bin(float(h))
        assert b == sql_case_bin(float(h)), h
        assert DELAY_EDGES_HOURS[b] <= max(h, 0.0) < DELAY_EDGES_HOURS[b + 1]
    assert delay_bins(hours).tolist() == [delay_bin(float(h)) for h in hours]


def test_nan_delay_is_refused() -> None:
    with pytest.raises(ValueError):
        delay_bin(math.nan)


def _product_limit(events: np.ndarray, censored: np.ndarray, p: float) -> float | None:
    """Kaplan and Meier (1958), written plainly: S(t) = prod over event times t_i <= t of
    (1 - d_i / n_i), where n_i counts those with an event or censoring at t_i or later."""
    survival = 1.0
    for t in np.unique(events):
        at_risk = np.sum(events >= t) + np.sum(censored >= t)
        survival *= 1.0 - np.sum(events == t) / at_risk
        if 1.0 - survival >= p - 1e-12:
            return float(t)
    return None


def _observed(
    seed: int, n: int = 4000, max_age_days: float = 30.0
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Labels with LogNormal(log 48 h, 1) delays, seen only if they came before the
    prediction's current age (Uniform(0, max_age_days)); the rest are censored at that age."""
    rng = np.random.default_rng(seed)
    delay = rng.lognormal(np.log(48.0), 1.0, n)
    age = rng.uniform(0.0, max_age_days * 24.0, n)
    seen = delay <= age
    return delay[seen], age[~seen], delay


def _upper_edge(hours: np.ndarray) -> np.ndarray:
    return np.array([DELAY_EDGES_HOURS[b + 1] for b in delay_bins(hours)])


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_km_equals_a_direct_product_limit_on_the_binned_delays(seed: int) -> None:
    # Binned estimator = product-limit with each label at its bin's upper edge and each
    # censored age at its bin's upper edge (censoring after events when they tie).
    delays, censored, _ = _observed(seed)
    got = km_quantiles(delay_histogram(delays), censored, probs=(0.25, 0.5, 0.9, 0.99))
    for name, p in {"p25": 0.25, "p50": 0.5, "p90": 0.9, "p99": 0.99}.items():
        assert got[name] == _product_limit(_upper_edge(delays), _upper_edge(censored), p)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_km_is_within_a_bin_of_the_product_limit_on_raw_delays(seed: int) -> None:
    delays, censored, _ = _observed(seed)
    got = km_quantiles(delay_histogram(delays), censored, probs=(0.5, 0.9))
    for name, p in {"p50": 0.5, "p90": 0.9}.items():
        raw = _product_limit(delays, censored, p)
        reported = got[name]
        assert raw is not None and reported is not None
        # The raw quantile falls inside the bin whose upper edge we report.
        lower = DELAY_EDGES_HOURS[delay_bin(reported - 1e-9)]
        assert lower <= raw <= reported, (name, raw, reported)


def test_censoring_keeps_quantiles_from_being_biased_low() -> None:
    # The delays that were seen are the short ones; their plain median is too low, while
    # KM with the unlabelled ages recovers the true median exp(log 48) = 48 h.
    delays, censored, _ = _observed(7, n=20_000, max_age_days=7.0)
    naive = float(np.median(delays))
    km = km_quantiles(delay_histogram(delays), censored)["p50"]
    assert naive < 40.0
    assert km is not None and 48.0 <= km <= 60.0


def test_not_reached_quantiles_are_none() -> None:
    hist = delay_histogram(np.array([1.0, 2.0, 3.0]))
    out = km_quantiles(hist, np.full(97, 5.0))
    assert out == {"p50": None, "p90": None, "p99": None}
    out = km_quantiles(hist, [])
    assert out == {"p50": 3.0, "p90": 4.0, "p99": 4.0}
    assert km_quantiles(np.zeros(N_DELAY_BINS, dtype=np.int64), [])["p50"] is None


def test_delays_past_400_days_have_no_finite_quantile() -> None:
    hist = delay_histogram(np.array([5.0, 10_000.0, 20_000.0]))
    assert km_quantiles(hist, [], probs=(0.3, 0.5)) == {"p30": 6.0, "p50": None}
