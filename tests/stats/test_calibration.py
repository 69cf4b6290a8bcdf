"""Brier score, log loss and ECE (belated/stats/calibration.py)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics
from sklearn.calibration import calibration_curve

from belated.stats.calibration import LOGLOSS_EPS, brier, ece, log_loss

from .builders import breast_cancer_scores, window_from


def test_brier_and_log_loss_match_scikit_learn_exactly() -> None:
    # Reference library: scikit-learn brier_score_loss and log_loss on load_breast_cancer
    # predictions; ours come from the exact sums kept in WindowStats.
    y, p = breast_cancer_scores()
    stats = window_from(y, p)
    assert brier(stats.brier_sum, stats.n_labelled).value == pytest.approx(
        metrics.brier_score_loss(y, p), rel=1e-12
    )
    assert log_loss(stats.logloss_sum, stats.n_labelled).value == pytest.approx(
        metrics.log_loss(y, p), rel=1e-12
    )


def test_log_loss_clips_certain_mistakes_at_float64_eps() -> None:
    # Reference library: scikit-learn log_loss, which clips p to [eps, 1 - eps] as we do.
    y = np.array([1, 0, 1, 0])
    p = np.array([0.0, 1.0, 1.0, 0.0])
    stats = window_from(y, p)
    expected = metrics.log_loss(y, p)
    assert log_loss(stats.logloss_sum, 4).value == pytest.approx(expected, rel=1e-12)
    assert log_loss(stats.logloss_sum, 4).value == pytest.approx(-np.log(LOGLOSS_EPS) / 2, rel=1e-6)


def test_ece_matches_scikit_learn_calibration_curve() -> None:
    # Reference library: scikit-learn calibration_curve (10 uniform bins) gives the positive
    # share and mean score of each non-empty bin; ECE weighs their gaps by bin size.
    y, p = breast_cancer_scores()
    stats = window_from(y, p)
    prob_true, prob_pred = calibration_curve(y, p, n_bins=10, strategy="uniform")
    counts = np.histogram(p, bins=10, range=(0.0, 1.0))[0]
    counts = counts[counts > 0]
    expected = float(np.dot(counts, np.abs(prob_true - prob_pred)) / counts.sum())
    got = ece(stats.hist_pos, stats.ssum_pos, stats.hist_neg, stats.ssum_neg).value
    assert got == pytest.approx(expected, rel=1e-9)


def test_ece_is_small_for_calibrated_and_large_for_shifted_scores() -> None:
    rng = np.random.default_rng(5)
    p = rng.beta(2.0, 5.0, size=20_000)
    y = (rng.random(p.size) < p).astype(np.int64)
    calibrated = window_from(y, p)
    small = ece(calibrated.hist_pos, calibrated.ssum_pos, calibrated.hist_neg,
                calibrated.ssum_neg).value  # fmt: skip
    assert small is not None and small < 0.02
    shifted = window_from(y, np.clip(p + 0.2, 0, 1))
    value = ece(shifted.hist_pos, shifted.ssum_pos, shifted.hist_neg, shifted.ssum_neg).value
    assert value == pytest.approx(0.2, abs=0.02)


def test_undefined_when_nothing_is_labelled() -> None:
    zeros = np.zeros(100)
    assert brier(0.0, 0).reason == "nothing labelled"
    assert log_loss(0.0, 0).reason == "nothing labelled"
    assert ece(zeros.astype(np.int64), zeros, zeros.astype(np.int64), zeros).value is None
