"""Proportion intervals and the Hanley-McNeil AUC interval (belated/stats/intervals.py)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import stats as sps
from statsmodels.stats.proportion import proportion_confint

from belated.stats.intervals import (
    INTERVAL_METHODS,
    hanley_mcneil,
    hanley_mcneil_se,
    proportion_interval,
    z_value,
)

STATSMODELS_NAME = {"wilson": "wilson", "clopper-pearson": "beta", "jeffreys": "jeffreys"}


@pytest.mark.parametrize("method", INTERVAL_METHODS)
@pytest.mark.parametrize("confidence", [0.8, 0.9, 0.95, 0.99])
def test_matches_statsmodels_proportion_confint(method: str, confidence: float) -> None:
    # Reference library: statsmodels proportion_confint (wilson, beta, jeffreys).
    for n in (1, 2, 7, 30, 263, 5000):
        for x in sorted({0, 1, n // 3, n // 2, n - 1, n}):
            if x < 0:
                continue
            low, high = proportion_interval(x, n, method=method, confidence=confidence)
            ref_low, ref_high = proportion_confint(
                x, n, alpha=1 - confidence, method=STATSMODELS_NAME[method]
            )
            if method == "jeffreys" and x == 0:
                # Brown, Cai and DasGupta (2001) boundary rule: the lower limit is 0 at x = 0.
                assert low == 0.0
            else:
                assert low == pytest.approx(float(ref_low), abs=1e-10), (x, n)
            if method == "jeffreys" and x == n:
                assert high == 1.0
            else:
                assert high == pytest.approx(float(ref_high), abs=1e-10), (x, n)


def test_jeffreys_interior_is_the_beta_quantiles() -> None:
    # scipy's Beta distribution as the reference: Beta(x + 1/2, n - x + 1/2) quantiles.
    for x, n in [(1, 10), (5, 10), (9, 10), (40, 300)]:
        low, high = proportion_interval(x, n, method="jeffreys", confidence=0.9)
        dist = sps.beta(x + 0.5, n - x + 0.5)
        assert low == pytest.approx(dist.ppf(0.05), rel=1e-10)
        assert high == pytest.approx(dist.ppf(0.95), rel=1e-10)


def test_newcombe_1998_single_proportion_table() -> None:
    # Newcombe (1998), "Two-sided confidence intervals for the single proportion: comparison
    # of seven methods", Statistics in Medicine 17:857-872, Table II. Values recalled from
    # memory and reproduced with statsmodels proportion_confint before being written here.
    wilson = {(81, 263): (0.2553, 0.3662), (15, 148): (0.0624, 0.1605),
              (0, 20): (0.0, 0.1611), (1, 29): (0.0061, 0.1718)}  # fmt: skip
    for (x, n), (low, high) in wilson.items():
        got = proportion_interval(x, n, method="wilson", confidence=0.95)
        assert got == pytest.approx((low, high), abs=5e-5), (x, n)
    exact = {(0, 20): (0.0, 0.1684), (1, 29): (0.0009, 0.1776)}
    for (x, n), (low, high) in exact.items():
        got = proportion_interval(x, n, method="clopper-pearson", confidence=0.95)
        assert got == pytest.approx((low, high), abs=5e-5), (x, n)


@pytest.mark.parametrize(
    ("x", "n", "kwargs"),
    [(1, 0, {}), (-1, 5, {}), (6, 5, {}), (1, 5, {"method": "wald"}), (1, 5, {"confidence": 1})],
)
def test_refuses_bad_input(x: int, n: int, kwargs: dict) -> None:
    with pytest.raises(ValueError):
        proportion_interval(x, n, **kwargs)


@given(
    st.integers(1, 100_000).flatmap(lambda n: st.tuples(st.integers(0, n), st.just(n))),
    st.sampled_from(INTERVAL_METHODS),
    st.floats(0.8, 0.999),
)
def test_interval_is_in_unit_range_and_contains_the_point(
    xn: tuple[int, int], method: str, confidence: float
) -> None:
    x, n = xn
    low, high = proportion_interval(x, n, method=method, confidence=confidence)
    assert 0.0 <= low <= x / n <= high <= 1.0


def test_wilson_coverage_averages_nominal() -> None:
    # Brown, Cai and DasGupta (2001), Statistical Science 16:101-133: the 95% Wilson
    # interval's coverage, averaged over p, stays close to 95%. Coverage here is exact:
    # the sum of binomial probabilities of the x whose interval covers p.
    grid = np.round(np.arange(0.05, 0.9501, 0.01), 2)
    for n in (30, 100, 300):
        x = np.arange(n + 1)
        bounds = np.array([proportion_interval(int(k), n, confidence=0.95) for k in x])
        covers = (bounds[:, :1] <= grid) & (grid <= bounds[:, 1:])
        coverage = (sps.binom.pmf(x[:, None], n, grid) * covers).sum(axis=0)
        worst = int(np.argmin(coverage))
        print(f"n={n}: mean coverage {coverage.mean():.4f}, worst {coverage[worst]:.4f} "
              f"at p={grid[worst]:.2f}")  # fmt: skip
        assert 0.94 <= coverage.mean() <= 0.96


def test_hanley_mcneil_se_matches_the_spread_of_auc_under_their_model() -> None:
    # Hanley and McNeil (1982), Radiology 143:29-36: Q1 = A/(2-A), Q2 = 2A^2/(1+A) are exact
    # for exponentially distributed scores, so their SE should match the simulated spread.
    rng = np.random.default_rng(1982)
    n_pos, n_neg, rate = 60, 90, 3.0  # negatives ~ Exp(1), positives ~ Exp(1/rate) (larger)
    true_auc = rate / (rate + 1.0)
    draws = 2000
    neg = rng.exponential(1.0, (draws, 1, n_neg))
    pos = rng.exponential(rate, (draws, n_pos, 1))
    # AUC by its definition: the share of (positive, negative) pairs in the right order.
    aucs = (pos > neg).mean(axis=(1, 2))
    se = hanley_mcneil_se(true_auc, n_pos, n_neg)
    assert np.std(aucs) == pytest.approx(se, rel=0.08)
    assert np.mean(aucs) == pytest.approx(true_auc, abs=0.005)


def test_hanley_mcneil_interval_shape() -> None:
    z = z_value(0.95)
    low, high = hanley_mcneil(0.8, 50, 50, z)
    assert low < 0.8 < high
    assert hanley_mcneil(0.8, 500, 500, z)[1] - hanley_mcneil(0.8, 500, 500, z)[0] < high - low
    assert hanley_mcneil(1.0, 10, 10, z) == (1.0, 1.0)
    assert 0.0 <= hanley_mcneil(0.02, 3, 3, z)[0]


def test_z_value() -> None:
    # scipy's normal distribution as the reference.
    for confidence in (0.5, 0.9, 0.95, 0.999):
        assert z_value(confidence) == pytest.approx(sps.norm.ppf(0.5 + confidence / 2), rel=1e-9)
