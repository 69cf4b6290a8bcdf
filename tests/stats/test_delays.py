"""Delay bins and Kaplan-Meier quantiles (belated/stats/delays.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from lifelines import KaplanMeierFitter
from lifelines.utils import qth_survival_time

from belated.stats.delays import (
    DELAY_EDGES_HOURS,
    N_DELAY_BINS,
    delay_bin,
    delay_bins,
    delay_histogram,
    km_quantiles,
    km_survival,
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


def _observed(
    seed: int,
    n: int = 4000,
    max_age_days: float = 30.0,
    median_hours: float = 48.0,
    sigma: float = 1.0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Labels with LogNormal(log median, sigma) delays, seen only if they came before the
    prediction's current age (Uniform(0, max_age_days)); the rest are censored at that age."""
    rng = np.random.default_rng(seed)
    delay = rng.lognormal(np.log(median_hours), sigma, n)
    age = rng.uniform(0.0, max_age_days * 24.0, n)
    seen = delay <= age
    return delay[seen], age[~seen], delay


def _lifelines_quantile(events: np.ndarray, censored: np.ndarray, p: float) -> float | None:
    """The first time where lifelines' Kaplan-Meier labelled share 1 - S reaches p
    (lifelines.KaplanMeierFitter and lifelines.utils.qth_survival_time, Davidson-Pilon 2019,
    "lifelines: survival analysis in Python", JOSS 4(40):1317)."""
    fit = KaplanMeierFitter().fit(
        np.r_[events, censored], np.r_[np.ones(events.size), np.zeros(censored.size)]
    )
    t = float(qth_survival_time(1.0 - p, fit.survival_function_))
    return t if math.isfinite(t) else None


def _bin_width(hours: float) -> float:
    b = delay_bin(hours)
    return DELAY_EDGES_HOURS[b + 1] - DELAY_EDGES_HOURS[b]


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_without_censoring_the_binned_estimate_is_lifelines_km_at_the_bin_edges(seed: int) -> None:
    # Plain Kaplan-Meier (no censoring): the labelled share at each bin's upper edge equals
    # lifelines' KM on the delays moved to their bins' upper edges, and each interpolated
    # quantile lies inside the bin where lifelines' binned quantile sits.
    _, _, delays = _observed(seed, n=3000)
    delays = delays[delays < 9000.0]
    upper = np.array([DELAY_EDGES_HOURS[b + 1] for b in delay_bins(delays)])
    share = 1.0 - km_survival(
        delay_histogram(delays), np.zeros(N_DELAY_BINS), censored_halfway=True
    )
    fit = KaplanMeierFitter().fit(upper, np.ones(upper.size))
    theirs = 1.0 - fit.survival_function_at_times(np.array(DELAY_EDGES_HOURS[1:-1])).to_numpy()
    assert np.allclose(share[:-1], theirs, atol=1e-12)
    got = km_quantiles(delay_histogram(delays), [], probs=(0.25, 0.5, 0.9, 0.99))
    for name, p in {"p25": 0.25, "p50": 0.5, "p90": 0.9, "p99": 0.99}.items():
        edge = _lifelines_quantile(upper, np.zeros(0), p)
        value = got[name]
        assert edge is not None and value is not None
        assert DELAY_EDGES_HOURS[delay_bin(edge - 1e-9)] <= value <= edge, (name, value, edge)


# (median hours, sigma, oldest age in days): fast, middling and slow labels, with enough
# data near p99 that the exact estimate is not a lone step (20,000 predictions each).
SHAPES = [(48.0, 1.0, 60.0), (10.0, 0.7, 10.0), (200.0, 0.8, 120.0)]


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
@pytest.mark.parametrize(("median", "sigma", "oldest"), SHAPES)
def test_quantiles_are_within_half_a_bin_of_lifelines_on_the_exact_delays(
    seed: int, median: float, sigma: float, oldest: float
) -> None:
    # Our estimate sees only the binned delays and the binned censoring ages; lifelines sees
    # the exact ones. DESIGN.md: p50, p90 and p99 within half a delay bin.
    delays, censored, _ = _observed(seed, 20_000, oldest, median, sigma)
    got = km_quantiles(delay_histogram(delays), censored)
    for name, p in {"p50": 0.5, "p90": 0.9, "p99": 0.99}.items():
        exact = _lifelines_quantile(delays, censored, p)
        value = got[name]
        assert exact is not None and value is not None, name
        assert abs(value - exact) <= 0.5 * _bin_width(value - 1e-9), (name, value, exact)


def test_a_quantile_is_interpolated_within_its_bin() -> None:
    # Labels at 1.5 h, 2.5 h and 3.5 h (bins 1, 2, 3); the share reaches 1/3, 2/3 and 1 at
    # 2, 3 and 4 h, so p50 lies halfway through bin 2 and p90 at 0.7 of bin 3.
    out = km_quantiles(delay_histogram(np.array([1.5, 2.5, 3.5])), [])
    assert out["p50"] == pytest.approx(2.5)
    assert out["p90"] == pytest.approx(3.7)
    assert out["p99"] == pytest.approx(3.97)


def test_censoring_keeps_quantiles_from_being_biased_low() -> None:
    # The delays that were seen are the short ones; their plain median is too low, while
    # KM with the unlabelled ages recovers the true median exp(log 48) = 48 h.
    delays, censored, _ = _observed(7, n=20_000, max_age_days=7.0)
    naive = float(np.median(delays))
    km = km_quantiles(delay_histogram(delays), censored)["p50"]
    assert naive < 40.0
    assert km is not None and 44.0 <= km <= 54.0


def test_not_reached_quantiles_are_none() -> None:
    hist = delay_histogram(np.array([1.0, 2.0, 3.0]))
    out = km_quantiles(hist, np.full(97, 5.0))
    assert out == {"p50": None, "p90": None, "p99": None}
    out = km_quantiles(hist, [])
    assert out == pytest.approx({"p50": 2.5, "p90": 3.7, "p99": 3.97})
    assert km_quantiles(np.zeros(N_DELAY_BINS, dtype=np.int64), [])["p50"] is None


def test_delays_past_400_days_have_no_finite_quantile() -> None:
    hist = delay_histogram(np.array([5.0, 10_000.0, 20_000.0]))
    assert km_quantiles(hist, [], probs=(0.3, 0.5)) == {"p30": 5.9, "p50": None}


def test_the_earlier_upper_edge_convention_is_kept_on_request() -> None:
    # The upper edge of the bin that holds the interpolated quantile, with censored
    # predictions at risk for their whole bin (the product-limit of Kaplan and Meier 1958 on
    # times moved to their bins' upper edges, censoring after events it ties with).
    hist = delay_histogram(np.array([1.5, 2.5, 3.5]))
    assert km_quantiles(hist, [], upper_edge=True) == {"p50": 3.0, "p90": 4.0, "p99": 4.0}
    delays, censored, _ = _observed(4)
    old = km_quantiles(delay_histogram(delays), censored, upper_edge=True)
    new = km_quantiles(delay_histogram(delays), censored)
    for name in ("p50", "p90"):
        value, edge = new[name], old[name]
        assert value is not None and edge is not None
        assert edge - _bin_width(edge - 1e-9) <= value <= edge
