"""A drop test for every measure a rule can watch (belated/stats/droptest.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import brentq

from belated.stats.change import drop_p_value
from belated.stats.delong import auc_drop_p_value
from belated.stats.droptest import (
    DROP_MEASURES,
    DropTest,
    average_precision_statistic,
    bootstrap_drop_p_value,
    confusion_statistic,
    drop_test,
    implied_cells,
    significant,
)
from belated.stats.window import WindowStats

ALPHA = 0.05


def _window(rng: np.random.Generator, n: int, prevalence: float = 0.2) -> WindowStats:
    """Calibrated scores p ~ Beta(a, 4) (mean = prevalence), actual ~ Bernoulli(p),
    flagged at p >= 0.4, every row labelled."""
    a = 4.0 * prevalence / (1.0 - prevalence)
    p = rng.beta(a, 4.0, size=n)
    y = (rng.random(n) < p).astype(np.int64)
    return WindowStats.from_rows(p, p >= 0.4, y.tolist())


def test_every_watchable_measure_has_a_test_and_reproduces() -> None:
    rng = np.random.default_rng(1)
    current, baseline = _window(rng, 400), _window(rng, 2800)
    for measure in DROP_MEASURES:
        first = drop_test(measure, current, baseline, resamples=300, seed=3)
        assert first.p_value is not None and 0.0 < first.p_value <= 1.0, measure
        assert drop_test(measure, current, baseline, resamples=300, seed=3) == first
    with pytest.raises(ValueError, match="no drop test"):
        drop_test("brier", current, baseline)
    with pytest.raises(ValueError, match="tolerance"):
        drop_test("recall", current, baseline, tolerance=-0.1)


def test_proportions_and_auc_use_their_exact_and_delong_tests() -> None:
    rng = np.random.default_rng(2)
    cur, base = _window(rng, 300), _window(rng, 2100)
    got = drop_test("recall", cur, base, tolerance=0.02)
    assert got == DropTest(drop_p_value(cur.tp, cur.tp + cur.fn, base.tp, base.tp + base.fn,
                                        0.02), "mid-p")  # fmt: skip
    rate = drop_test("positive_rate", cur, base)
    assert rate.p_value == drop_p_value(cur.n_pred_pos, cur.n_pred, base.n_pred_pos, base.n_pred)
    auc = drop_test("roc_auc", cur, base, tolerance=0.01)
    assert auc.p_value == auc_drop_p_value(
        cur.hist_pos, cur.hist_neg, base.hist_pos, base.hist_neg, 0.01
    )


def test_a_missing_p_value_is_never_significant() -> None:
    rng = np.random.default_rng(3)
    base = _window(rng, 500)
    # A window whose every labelled prediction is negative: recall, fbeta, roc_auc and
    # average precision are undefined there, so there is no test and nothing fires.
    p = np.full(50, 0.05)
    negatives = WindowStats.from_rows(p, p >= 0.4, [0] * 50)
    for measure in ("recall", "fbeta", "roc_auc", "average_precision"):
        result = drop_test(measure, negatives, base)
        assert result.p_value is None and result.reason, measure
        assert not result.significant(ALPHA) and not significant(result.p_value, ALPHA)
    assert significant(0.01, ALPHA) and not significant(0.05, ALPHA)
    nothing = WindowStats.empty()
    assert drop_test("implied.precision", nothing, base).p_value is None
    assert drop_test("positive_rate", nothing, base).p_value is None


def test_implied_cells_rebuild_the_expected_counts_when_the_flag_is_a_threshold() -> None:
    rng = np.random.default_rng(4)
    s = _window(rng, 3000)
    cells, means = implied_cells(s.hist_all, s.ssum_all, s.n_pred_pos)
    assert cells[:100].sum() == s.n_pred_pos and cells.sum() == s.n_pred
    assert float(cells[:100] @ means[:100]) == pytest.approx(s.exp_tp, rel=1e-12)
    assert float(cells[100:] @ means[100:]) == pytest.approx(s.exp_fn, rel=1e-12)


def test_bootstrap_of_a_proportion_agrees_with_the_exact_test() -> None:
    # Reference: the exact unconditional mid-p (checked in test_change.py against the full
    # double sum and scipy) for the same proportion; the null bootstrap of precision treated
    # as a statistic of the four confusion cells should give nearly the same p-value in a
    # large window. 20,000 resamples: Monte Carlo error of a p near 0.05 about 0.0015.
    cur = np.array([300.0, 130.0, 170.0, 1400.0])
    base = np.array([2200.0, 800.0, 1200.0, 9800.0])

    def precision(cells: np.ndarray) -> np.ndarray:
        return np.asarray(cells[..., 0] / (cells[..., 0] + cells[..., 1]))

    boot = bootstrap_drop_p_value(precision, cur, base, resamples=20_000, seed=9)
    exact = drop_p_value(300, 430, 2200, 3000)
    assert boot is not None and 0.005 < exact < 0.5
    assert boot == pytest.approx(exact, abs=0.01)


def _f1(cells: np.ndarray) -> float:
    return float(2 * cells[0] / (2 * cells[0] + cells[1] + cells[2]))


@pytest.mark.slow
@pytest.mark.parametrize("tolerance", [0.0, 0.05])
def test_confusion_bootstrap_false_alarm_rate(tolerance: float) -> None:
    # Seeded simulation at the boundary of H0 for F1: the baseline's cell probabilities
    # (tp, fp, fn, tn) = (0.12, 0.05, 0.08, 0.75), F1 0.649; the current window's move
    # recall's mass from tp to fn until its F1 is the baseline's less the tolerance. Windows
    # of 150 labelled items (about 26 positives), baselines of 1,050; 2,000 windows, 500
    # resamples each; MCSE of a 5% rate 0.0049; asserted within alpha +- 3 MCSE.
    base_p = np.array([0.12, 0.05, 0.08, 0.75])
    shift = brentq(lambda x: _f1(base_p + [-x, 0, x, 0]) - (_f1(base_p) - tolerance), 0, 0.1)
    cur_p = base_p + np.array([-shift, 0.0, shift, 0.0])
    rng = np.random.default_rng(2006)
    windows = 2000
    mcse = np.sqrt(ALPHA * (1 - ALPHA) / windows)
    statistic = confusion_statistic("fbeta", 1.0)
    rejections = 0
    for seed in range(windows):
        cur = rng.multinomial(150, cur_p)
        base = rng.multinomial(1050, base_p)
        p = bootstrap_drop_p_value(
            statistic, cur, base, tolerance=tolerance, resamples=500, seed=seed
        )
        rejections += significant(p, ALPHA)
    assert abs(rejections / windows - ALPHA) <= 3 * mcse


@pytest.mark.slow
@pytest.mark.parametrize("measure", ["implied.precision", "implied.fbeta"])
def test_implied_bootstrap_false_alarm_rate(measure: str) -> None:
    # Seeded simulation under H0 (both windows from one population): calibrated scores
    # p ~ Beta(1, 4), flagged at p >= 0.4 (about 13%), windows of 150 predictions (about
    # 19 flagged) against baselines of 1,050; 2,000 windows, 500 resamples each; MCSE of a
    # 5% rate 0.0049; asserted within alpha +- 3 MCSE.
    rng = np.random.default_rng(2007)
    windows = 2000
    mcse = np.sqrt(ALPHA * (1 - ALPHA) / windows)
    rejections = 0
    for seed in range(windows):
        result = drop_test(measure, _window(rng, 150), _window(rng, 1050), resamples=500, seed=seed)
        rejections += result.significant(ALPHA)
    assert abs(rejections / windows - ALPHA) <= 3 * mcse


@pytest.mark.slow
def test_average_precision_bootstrap_false_alarm_rate() -> None:
    # Seeded simulation under H0: binned scores of positives and negatives from fixed bin
    # probabilities (the score histogram of calibrated Beta(1, 4) scores split by class,
    # estimated once from 200,000 rows); windows of 150 labelled items (about 30 positives)
    # against baselines of 1,050; 2,000 windows, 400 resamples each; MCSE 0.0049; asserted
    # within alpha +- 3 MCSE. (A bootstrap centred on the observed difference gave 0.035
    # here: a small window's average precision runs high.)
    rng = np.random.default_rng(2008)
    population = _window(rng, 200_000)
    cells = np.concatenate([population.hist_pos, population.hist_neg]).astype(np.float64)
    shares = cells / cells.sum()
    windows = 2000
    mcse = np.sqrt(ALPHA * (1 - ALPHA) / windows)
    rejections = 0
    for seed in range(windows):
        cur, base = rng.multinomial(150, shares), rng.multinomial(1050, shares)
        p = bootstrap_drop_p_value(average_precision_statistic, cur, base, resamples=400,
                                   seed=seed)  # fmt: skip
        rejections += significant(p, ALPHA)
    assert abs(rejections / windows - ALPHA) <= 3 * mcse
