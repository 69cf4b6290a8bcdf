"""DeLong's AUC variance, interval and drop test from histograms (belated/stats/delong.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import expit, logit
from scipy.stats import norm
from sklearn import metrics

from belated.stats.delong import (
    auc_drop_p_value,
    delong_arrays,
    delong_interval,
    delong_interval_arrays,
)
from belated.stats.ranking import score_bins

from .builders import breast_cancer_scores

Z95 = float(norm.ppf(0.975))


def _hists(y: np.ndarray, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    bins = score_bins(p)
    return np.bincount(bins[y == 1], minlength=100), np.bincount(bins[y == 0], minlength=100)


def _direct_delong(pos: np.ndarray, neg: np.ndarray) -> tuple[float, float]:
    """DeLong, DeLong and Clarke-Pearson (1988) from every (positive, negative) pair."""
    # Structural components: each positive's share of negatives below it (ties one half),
    # and each negative's share of positives above it.
    wins = (pos[:, None] > neg[None, :]) + 0.5 * (pos[:, None] == neg[None, :])
    v10, v01 = wins.mean(axis=1), wins.mean(axis=0)
    auc = float(v10.mean())
    return auc, float(v10.var(ddof=1) / pos.size + v01.var(ddof=1) / neg.size)


def _datasets() -> list[tuple[str, np.ndarray, np.ndarray]]:
    y, p = breast_cancer_scores()
    rng = np.random.default_rng(88)
    y2 = (rng.random(700) < 0.15).astype(np.int64)
    p2 = expit(rng.normal(-1.5 + 1.6 * y2, 1.0))
    return [("breast_cancer", y, p), ("rare_positives", y2, p2)]


@pytest.mark.parametrize(("name", "y", "p"), _datasets())
def test_equal_to_a_direct_delong_on_the_expanded_scores(name: str, y: np.ndarray, p: np.ndarray):
    # Reference: the pairwise definition of the placement values (DeLong, DeLong and
    # Clarke-Pearson 1988, Biometrics 44:837-845, section 2) on the bin index of every row,
    # so that rows sharing a bin are tied; scikit-learn roc_auc_score for the AUC itself.
    hist_pos, hist_neg = _hists(y, p)
    bins = score_bins(p)
    auc, variance = _direct_delong(bins[y == 1], bins[y == 0])
    got = delong_arrays(hist_pos, hist_neg)
    assert float(got["roc_auc"]) == pytest.approx(metrics.roc_auc_score(y, bins), rel=1e-12)
    assert float(got["roc_auc"]) == pytest.approx(auc, rel=1e-12)
    assert float(got["variance"]) == pytest.approx(variance, rel=1e-10)


@pytest.mark.parametrize(("name", "y", "p"), _datasets())
def test_variance_agrees_with_the_bootstrap(name: str, y: np.ndarray, p: np.ndarray) -> None:
    # Reference: the variance of the AUC over 4,000 bootstrap resamples drawn within each
    # class (positives and negatives resampled apart, as the design holds the class sizes);
    # DeLong's estimate and the bootstrap's agree to within 10% (the bootstrap's own Monte
    # Carlo error is about 2%, and the two differ by O(1/n) terms).
    hist_pos, hist_neg = _hists(y, p)
    rng = np.random.default_rng(4000)
    n_pos, n_neg = int(hist_pos.sum()), int(hist_neg.sum())
    draws_pos = rng.multinomial(n_pos, hist_pos / n_pos, size=4000)
    draws_neg = rng.multinomial(n_neg, hist_neg / n_neg, size=4000)
    boot = delong_arrays(draws_pos, draws_neg)["roc_auc"]
    variance = float(delong_arrays(hist_pos, hist_neg)["variance"])
    assert variance == pytest.approx(float(boot.var()), rel=0.10)


def test_interval_shape_and_undefined_cases() -> None:
    y, p = breast_cancer_scores()
    hist_pos, hist_neg = _hists(y, p)
    auc = float(delong_arrays(hist_pos, hist_neg)["roc_auc"])
    interval = delong_interval(hist_pos, hist_neg, Z95)
    assert interval is not None
    low, high = interval
    assert 0.0 < low < auc < high < 1.0
    # On the logit scale the interval leans away from 1.
    assert auc - low > high - auc
    one = np.zeros(100, dtype=np.int64)
    one[70] = 1
    some = np.zeros(100, dtype=np.int64)
    some[[10, 20, 80]] = [4, 5, 1]
    assert delong_interval(one, some, Z95) is None
    assert np.isnan(delong_arrays(np.zeros(100), some)["roc_auc"])
    # Perfect separation: AUC 1 with no spread, the Wald fallback at the boundary.
    apart = np.zeros(100, dtype=np.int64)
    apart[90] = 5
    assert delong_interval(apart, some, Z95) == (1.0, 1.0)
    lows, highs = delong_interval_arrays(np.array([np.nan, 0.7]), np.array([0.01, np.nan]), Z95)
    assert np.isnan(lows).all() and np.isnan(highs).all()


def _edges() -> np.ndarray:
    with np.errstate(divide="ignore"):
        return np.asarray(logit(np.arange(101) / 100))


def _binned(mean: float, shift: float) -> np.ndarray:
    """Bin probabilities of sigmoid(x - shift), x ~ N(mean, 1): exact, from the normal cdf."""
    return np.diff(norm.cdf(_edges() + shift - mean))


def _population(d: float) -> tuple[np.ndarray, np.ndarray, float]:
    """Binormal classes (positives N(d, 1), negatives N(0, 1)) binned to 100 score bins."""
    pos, neg = _binned(d, d / 2), _binned(0.0, d / 2)
    return pos, neg, float(np.dot(pos, np.cumsum(neg) - 0.5 * neg))


def test_interval_coverage_by_simulation() -> None:
    # Seeded simulation: windows of m positives and n negatives from binned binormal classes
    # with separations d = 1, 2, 3 (binned AUC 0.76, 0.92, 0.98); 2,000 windows a cell, MCSE
    # of a 95% coverage 0.005. Asserted: coverage at least 0.88 in every cell and 0.925 on
    # average over the cells with 100 or more positives (measured 0.89-0.95; the plain Wald
    # interval gave 0.80 at 20 positives and AUC 0.98, and Hanley-McNeil over-covers at
    # 0.96-0.998, so its intervals were too wide).
    rng = np.random.default_rng(1988)
    coverage: dict[tuple[int, int, float], float] = {}
    for m, n in [(20, 200), (50, 200), (100, 900), (300, 1200)]:
        for d in (1.0, 2.0, 3.0):
            pos, neg, truth = _population(d)
            hist_pos = rng.multinomial(m, pos, size=2000)
            hist_neg = rng.multinomial(n, neg, size=2000)
            arrays = delong_arrays(hist_pos, hist_neg)
            low, high = delong_interval_arrays(arrays["roc_auc"], arrays["variance"], Z95)
            coverage[(m, n, d)] = float(np.mean((low <= truth) & (truth <= high)))
    assert min(coverage.values()) >= 0.88, coverage
    large = [c for (m, _, _), c in coverage.items() if m >= 100]
    assert float(np.mean(large)) >= 0.925, coverage


def _shifted(target: float) -> float:
    """The separation whose binned AUC is `target` (bisection)."""
    lo, hi = 0.0, 6.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if _population(mid)[2] < target else (lo, mid)
    return 0.5 * (lo + hi)


@pytest.mark.parametrize("tolerance", [0.0, 0.03])
def test_drop_test_false_alarm_rate_by_simulation(tolerance: float) -> None:
    # Seeded simulation at the boundary of H0: the current window's population AUC is the
    # baseline's less the tolerance; m positives and 4m negatives now, seven times as many in
    # the baseline; m in {20, 50, 200}, baseline separation d in {1, 2}; 2,000 windows a
    # cell (MCSE 0.0049 at alpha 0.05). Every cell's rate at most alpha + 3 MCSE, and within
    # alpha +- 3 MCSE from 50 positives up.
    alpha, windows = 0.05, 2000
    mcse = np.sqrt(alpha * (1 - alpha) / windows)
    rng = np.random.default_rng(1045)
    for m in (20, 50, 200):
        for d in (1.0, 2.0):
            base_pos, base_neg, base_auc = _population(d)
            cur_pos, cur_neg, _ = _population(_shifted(base_auc - tolerance))
            draws = [
                rng.multinomial(m, cur_pos, size=windows),
                rng.multinomial(4 * m, cur_neg, size=windows),
                rng.multinomial(7 * m, base_pos, size=windows),
                rng.multinomial(28 * m, base_neg, size=windows),
            ]
            pvalues = [
                auc_drop_p_value(*cells, tolerance=tolerance) for cells in zip(*draws, strict=True)
            ]
            assert all(p is not None for p in pvalues)
            rate = float(np.mean([p is not None and p < alpha for p in pvalues]))
            assert rate <= alpha + 3 * mcse, (m, d, rate)
            if m >= 50:
                assert rate >= alpha - 3 * mcse, (m, d, rate)


def test_drop_test_direction_and_no_test() -> None:
    pos, neg, _ = _population(2.0)
    weak_pos, weak_neg, _ = _population(0.5)
    rng = np.random.default_rng(5)
    good = rng.multinomial(200, pos), rng.multinomial(800, neg)
    weak = rng.multinomial(200, weak_pos), rng.multinomial(800, weak_neg)
    dropped = auc_drop_p_value(*weak, *good)
    assert dropped is not None and dropped < 1e-6
    rose = auc_drop_p_value(*good, *weak)
    assert rose is not None and rose > 0.99
    # A large enough tolerance forgives the drop.
    forgiven = auc_drop_p_value(*weak, *good, tolerance=0.4)
    assert forgiven is not None and forgiven > 0.5
    empty = np.zeros(100, dtype=np.int64)
    assert auc_drop_p_value(empty, good[1], *good) is None
