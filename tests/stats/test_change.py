"""Tests of change between windows (belated/stats/change.py, re-exported by drift.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import chi2_contingency, false_discovery_control, norm
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import confint_proportions_2indep, proportions_ztest

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
