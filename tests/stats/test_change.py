"""Tests of change between windows (belated/stats/change.py, re-exported by drift.py)."""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import pytest
from scipy.optimize import minimize_scalar
from scipy.stats import (
    binom,
    chi2_contingency,
    false_discovery_control,
    fisher_exact,
    hypergeom,
    norm,
)
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import (
    confint_proportions_2indep,
    proportions_ztest,
)
from statsmodels.stats.proportion import (
    test_proportions_2indep as sm_test_proportions_2indep,
)

from belated.stats.change import (
    conditional_mid_p_less,
    drop_p_value,
    restricted_mle_diff,
    score_test_diff,
    unconditional_mid_p_less,
)
from belated.stats.drift import benjamini_hochberg, newcombe_diff_interval, two_proportion_test

CASES = [(56, 70, 48, 80), (9, 10, 3, 10), (5, 56, 0, 29), (10, 10, 0, 20), (120, 1000, 150, 1100)]


@pytest.mark.parametrize(("x1", "n1", "x2", "n2"), CASES)
def test_score_test_matches_statsmodels_and_the_chi_square(x1: int, n1: int, x2: int, n2: int):
    # Reference library: statsmodels proportions_ztest (pooled variance); scipy as a second
    # oracle, since z^2 is Pearson's chi-square without continuity correction.
    result = two_proportion_test(x1, n1, x2, n2)
    for alternative, got in [("two-sided", result.p_two_sided), ("larger", result.p_greater),
                             ("smaller", result.p_less)]:  # fmt: skip
        z, p = proportions_ztest([x1, x2], [n1, n2], alternative=alternative)
        assert result.z == pytest.approx(z, rel=1e-10)
        assert got == pytest.approx(p, rel=1e-9, abs=1e-300)
    chi2 = chi2_contingency([[x1, n1 - x1], [x2, n2 - x2]], correction=False)[0]
    assert result.z**2 == pytest.approx(chi2, rel=1e-10)
    assert result.p_two_sided == pytest.approx(2 * norm.sf(abs(result.z)), rel=1e-9)


def test_score_test_degenerate_and_invalid() -> None:
    assert two_proportion_test(0, 50, 0, 80) == (0.0, 1.0, 1.0, 1.0)
    assert two_proportion_test(50, 50, 80, 80) == (0.0, 1.0, 1.0, 1.0)
    with pytest.raises(ValueError):
        two_proportion_test(1, 0, 1, 5)


def test_newcombe_1998_difference_table() -> None:
    # Newcombe (1998), "Interval estimation for the difference between independent
    # proportions: comparison of eleven methods", Statistics in Medicine 17:873-890, Table II,
    # hybrid score method (10). Values recalled from memory and reproduced with statsmodels
    # confint_proportions_2indep(method="newcomb") before being written here.
    table = {
        (56, 70, 48, 80): (0.0524, 0.3339),
        (9, 10, 3, 10): (0.1705, 0.8090),
        (5, 56, 0, 29): (-0.0381, 0.1926),
        (10, 10, 0, 20): (0.6791, 1.0000),
    }
    for (x1, n1, x2, n2), expected in table.items():
        assert newcombe_diff_interval(x1, n1, x2, n2, 0.95) == pytest.approx(expected, abs=5e-5)


@pytest.mark.parametrize("confidence", [0.8, 0.9, 0.95, 0.99])
@pytest.mark.parametrize(("x1", "n1", "x2", "n2"), CASES)
def test_newcombe_matches_statsmodels(x1: int, n1: int, x2: int, n2: int, confidence: float):
    # Reference library: statsmodels confint_proportions_2indep(method="newcomb").
    low, high = confint_proportions_2indep(
        x1, n1, x2, n2, method="newcomb", compare="diff", alpha=1 - confidence
    )
    got = newcombe_diff_interval(x1, n1, x2, n2, confidence)
    assert got == pytest.approx((float(low), float(high)), abs=1e-10)
    assert got[0] <= x1 / n1 - x2 / n2 <= got[1]


BH_1995 = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
           0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]  # fmt: skip


def test_benjamini_hochberg_1995_example() -> None:
    # Benjamini and Hochberg (1995), JRSS B 57:289-300, the fifteen p-values of their
    # example: at q = 0.05 the step-up procedure rejects four, Bonferroni only three.
    # Values recalled from memory and reproduced with statsmodels before being written here.
    adjusted, reject = benjamini_hochberg(BH_1995, 0.05)
    assert sum(reject) == 4
    assert reject[:4] == [True] * 4
    assert sum(p <= 0.05 / len(BH_1995) for p in BH_1995) == 3
    # Reference libraries: statsmodels multipletests(fdr_bh), scipy false_discovery_control.
    sm_reject, sm_adjusted, _, _ = multipletests(BH_1995, alpha=0.05, method="fdr_bh")
    assert adjusted == pytest.approx(list(sm_adjusted), rel=1e-12)
    assert reject == list(sm_reject)
    assert adjusted == pytest.approx(list(false_discovery_control(BH_1995)), rel=1e-12)


def test_benjamini_hochberg_keeps_input_order_and_matches_statsmodels() -> None:
    rng = np.random.default_rng(12)
    pvalues = np.r_[rng.uniform(0, 0.01, 5), rng.uniform(0, 1, 30)]
    rng.shuffle(pvalues)
    adjusted, reject = benjamini_hochberg(pvalues.tolist(), 0.1)
    sm_reject, sm_adjusted, _, _ = multipletests(pvalues, alpha=0.1, method="fdr_bh")
    assert adjusted == pytest.approx(list(sm_adjusted), rel=1e-12)
    assert reject == list(sm_reject)
    assert benjamini_hochberg([], 0.05) == ([], [])
    with pytest.raises(ValueError):
        benjamini_hochberg([0.5, 1.2], 0.05)


@pytest.mark.parametrize(("x1", "n1", "x2", "n2"), [*CASES, (3, 30, 60, 210), (0, 12, 5, 90)])
def test_conditional_mid_p_is_fishers_one_sided_p_less_half_the_point_probability(
    x1: int, n1: int, x2: int, n2: int
) -> None:
    # Reference library: scipy fisher_exact(alternative="less") and hypergeom.pmf; the mid-p
    # definition is Lancaster (1961), as in Agresti (2013), Categorical Data Analysis, 1.4.5.
    fisher = fisher_exact([[x1, n1 - x1], [x2, n2 - x2]], alternative="less").pvalue
    point = hypergeom(n1 + n2, x1 + x2, n1).pmf(x1)
    assert conditional_mid_p_less(x1, n1, x2, n2) == pytest.approx(fisher - point / 2, rel=1e-9)


def _statsmodels_score(
    x1: int, n1: int, x2: int, n2: int, value: float, alternative: str, correction: bool
) -> Any:
    with warnings.catch_warnings():
        # statsmodels computes an odds ratio it does not report, dividing by 0 at a 0 count.
        warnings.simplefilter("ignore", RuntimeWarning)
        return sm_test_proportions_2indep(
            x1, n1, x2, n2, value=value, method="score", compare="diff",
            alternative=alternative, correction=correction,
        )  # fmt: skip


@pytest.mark.parametrize("correction", [True, False])
@pytest.mark.parametrize(("x1", "n1", "x2", "n2"), CASES)
def test_score_test_at_no_difference_matches_statsmodels(
    x1: int, n1: int, x2: int, n2: int, correction: bool
) -> None:
    # Reference library: statsmodels test_proportions_2indep(method="score", compare="diff"),
    # Miettinen-Nurminen with correction, Farrington-Manning without.
    for alternative, attr in [("smaller", "p_less"), ("larger", "p_greater"),
                              ("two-sided", "p_two_sided")]:  # fmt: skip
        ref = _statsmodels_score(x1, n1, x2, n2, 0.0, alternative, correction)
        got = score_test_diff(x1, n1, x2, n2, 0.0, correction=correction)
        assert got.z == pytest.approx(ref.statistic, rel=1e-10)
        assert getattr(got, attr) == pytest.approx(ref.pvalue, rel=1e-9)


def _restricted_mle_by_optimiser(x1: int, n1: int, x2: int, n2: int, value: float) -> float:
    def minus_loglik(p2: float) -> float:
        return -float(binom.logpmf(x1, n1, p2 + value) + binom.logpmf(x2, n2, p2))

    lo, hi = max(0.0, -value), min(1.0, 1.0 - value)
    found = minimize_scalar(minus_loglik, bounds=(lo + 1e-13, hi - 1e-13), method="bounded",
                            options={"xatol": 1e-13})  # fmt: skip
    return float(found.x)


@pytest.mark.parametrize("value", [-0.3, -0.05, 0.02, 0.2])
@pytest.mark.parametrize(("x1", "n1", "x2", "n2"), [*CASES, (12, 297, 78, 235), (0, 6, 63, 225)])
def test_score_test_at_a_shifted_null(x1: int, n1: int, x2: int, n2: int, value: float) -> None:
    # Reference: the restricted maximum-likelihood estimate found by scipy's bounded optimiser
    # on the binomial log-likelihood, and the score statistic of Farrington and Manning (1990,
    # Statistics in Medicine 9:1447-1454, eq. 1) written out from it. statsmodels 0.15.0
    # test_proportions_2indep is the reference only at value 0: for value != 0 its cubic has
    # count2 where the paper's quadratic-term coefficient has nobs2 (at x2 = n2 they agree),
    # so its restricted estimate is off the likelihood's maximum (checked with the optimiser).
    p2 = _restricted_mle_by_optimiser(x1, n1, x2, n2, value)
    p1 = p2 + value
    got_p1, got_p2 = restricted_mle_diff(x1, n1, x2, n2, value)
    assert (got_p1, got_p2) == pytest.approx((p1, p2), abs=2e-6)
    variance = got_p1 * (1 - got_p1) / n1 + got_p2 * (1 - got_p2) / n2
    z = (x1 / n1 - x2 / n2 - value) / np.sqrt(variance)
    assert score_test_diff(x1, n1, x2, n2, value, correction=False).z == pytest.approx(z, rel=1e-9)
    if x2 == n2:
        ref = _statsmodels_score(x1, n1, x2, n2, value, "two-sided", False)
        assert ref.statistic == pytest.approx(z, rel=1e-8)


SHIFTED = [(20, 30, 160, 210, 0.05), (3, 12, 40, 50, 0.1), (28, 30, 95, 100, 0.02),
           (0, 15, 2, 40, 0.1), (20, 30, 160, 210, 0.0), (9, 40, 9, 40, 0.0)]  # fmt: skip


@pytest.mark.parametrize(("x1", "n1", "x2", "n2", "tolerance"), SHIFTED)
def test_unconditional_mid_p_equals_the_full_double_sum(
    x1: int, n1: int, x2: int, n2: int, tolerance: float
) -> None:
    # Reference: the definition summed over every (k1, k2) with scipy's binomial pmf at the
    # restricted estimate (Krishnamoorthy and Thomson 2004, the E-test, with mid-p ties).
    p1, p2 = restricted_mle_diff(x1, n1, x2, n2, -tolerance)
    k1, k2 = np.meshgrid(np.arange(n1 + 1), np.arange(n2 + 1), indexing="ij")
    weight = binom.pmf(k1, n1, p1) * binom.pmf(k2, n2, p2)
    order = k1 * n2 - k2 * n1 - (x1 * n2 - x2 * n1)
    expected = weight[order < 0].sum() + 0.5 * weight[order == 0].sum()
    got = unconditional_mid_p_less(x1, n1, x2, n2, -tolerance)
    assert got == pytest.approx(expected, rel=1e-9, abs=1e-15)
    assert drop_p_value(x1, n1, x2, n2, tolerance) == got


def test_drop_p_value_reads_the_tolerance_and_refuses_nonsense() -> None:
    assert drop_p_value(40, 60, 300, 420, 0.0) == unconditional_mid_p_less(40, 60, 300, 420, 0.0)
    # Without a tolerance the restricted estimate is the pooled rate.
    assert restricted_mle_diff(40, 60, 300, 420, 0.0) == (340 / 480, 340 / 480)
    # A larger tolerance forgives more of the same drop.
    assert drop_p_value(40, 60, 300, 420, 0.0) < drop_p_value(40, 60, 300, 420, 0.05)
    assert drop_p_value(0, 60, 300, 420) < 1e-20
    assert drop_p_value(60, 60, 300, 420) > 0.99
    for bad in [(1, 0, 1, 5, 0.0), (7, 5, 1, 5, 0.0), (1, 5, 1, 5, -0.1), (1, 5, 1, 5, 1.0)]:
        with pytest.raises(ValueError):
            drop_p_value(*bad)


ALPHA = 0.05


@pytest.mark.slow
@pytest.mark.parametrize("tolerance", [0.0, 0.05])
def test_drop_test_holds_its_level_from_30_to_1000_trials(tolerance: float) -> None:
    # Seeded simulation at the boundary of H0 (current rate = baseline rate - tolerance):
    # current x1 ~ Bin(n, p - tolerance), baseline x2 ~ Bin(7n, p) (seven pooled windows), for
    # n in {30, 100, 300, 1000} and p in {0.5, 0.8, 0.95}; 2,000 windows per cell, so the
    # Monte Carlo standard error of a 5% rate is 0.0049. Each cell's false-alarm rate must lie
    # within alpha +- 3 MCSE. (Newcombe 1998 for the family of two-proportion intervals whose
    # level at small n motivates exact and mid-p methods; statsmodels as the reference
    # implementation of the score test.)
    windows = 2000
    mcse = np.sqrt(ALPHA * (1 - ALPHA) / windows)
    rng = np.random.default_rng(1998)
    rates = {}
    for n in (30, 100, 300, 1000):
        for p in (0.5, 0.8, 0.95):
            x1 = rng.binomial(n, p - tolerance, windows).tolist()
            x2 = rng.binomial(7 * n, p, windows).tolist()
            pvalues = [drop_p_value(a, n, b, 7 * n, tolerance) for a, b in zip(x1, x2, strict=True)]
            rates[(n, p)] = float(np.mean(np.array(pvalues) < ALPHA))
    for cell, rate in rates.items():
        assert abs(rate - ALPHA) <= 3 * mcse, (cell, rate)


@pytest.mark.slow
@pytest.mark.parametrize("tolerance", [0.0, 0.05])
def test_benjamini_hochberg_over_ten_null_segments_keeps_the_family_rate(tolerance: float) -> None:
    # Seeded simulation: one evaluation fans a drop rule on recall out over 10 segments, each
    # with 60 actual positives now and 420 in its baseline, none of them changed (true recall
    # 0.8 in the baseline, 0.8 - tolerance now); Benjamini and Hochberg (1995) at q = 0.05.
    # Under the global null the family rate (any alert) equals the FDR, which BH holds at q
    # for independent p-values that are valid; 2,000 evaluations, MCSE 0.0049. The pooled
    # z-test p-values, liberal in the lower tail, gave 0.056-0.085 in this setting (recall
    # 0.6-0.9, 2,500 evaluations, another seed).
    evaluations = 2000
    mcse = np.sqrt(ALPHA * (1 - ALPHA) / evaluations)
    rng = np.random.default_rng(1995)
    alarms = 0
    for _ in range(evaluations):
        x1 = rng.binomial(60, 0.8 - tolerance, 10).tolist()
        x2 = rng.binomial(420, 0.8, 10).tolist()
        pvalues = [drop_p_value(a, 60, b, 420, tolerance) for a, b in zip(x1, x2, strict=True)]
        alarms += any(benjamini_hochberg(pvalues, ALPHA)[1])
    assert alarms / evaluations <= ALPHA + 3 * mcse
