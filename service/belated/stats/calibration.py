"""Brier score, log loss and expected calibration error.

Brier score and log loss are means of per-row terms whose sums the rollups keep exactly
(`brier_terms`, `logloss_terms` give those terms for raw rows, so every layer computes them
the same way). Scores are the positive-class probability p; y is 1 for an actual positive.

Expected calibration error (ECE), the convention used here: 10 equal-width bins of p (the
100 histogram bins merged by tens, so bin j holds p in [j/10, (j+1)/10), the last closed
at 1), over labelled predictions; in each bin the mean score is compared with the share of
actual positives, and the absolute gaps are averaged with weights count / total:

    ECE = sum_j (n_j / N) * |mean p in bin j - positive share in bin j|.
"""

from __future__ import annotations

import numpy as np

from belated.stats.measures import NOTHING_LABELLED
from belated.stats.values import Value

# float64 machine epsilon, the clip scikit-learn also applies to log loss.
LOGLOSS_EPS = float(np.finfo(np.float64).eps)

ECE_BINS = 10


def brier_terms(scores: np.ndarray, actual: np.ndarray) -> np.ndarray:
    """Per-row Brier terms (p - y)^2."""
    p = np.asarray(scores, dtype=np.float64)
    return (p - np.asarray(actual, dtype=np.float64)) ** 2


def logloss_terms(scores: np.ndarray, actual: np.ndarray) -> np.ndarray:
    """Per-row log loss terms -[y log p + (1 - y) log(1 - p)], p clipped to [eps, 1 - eps]."""
    p = np.clip(np.asarray(scores, dtype=np.float64), LOGLOSS_EPS, 1.0 - LOGLOSS_EPS)
    y = np.asarray(actual, dtype=np.float64)
    return -(y * np.log(p) + (1.0 - y) * np.log1p(-p))


def brier(brier_sum: float, n_labelled: int) -> Value:
    """Mean Brier score of the labelled predictions; undefined when nothing is labelled."""
    if n_labelled == 0:
        return Value.undefined(NOTHING_LABELLED)
    return Value(float(brier_sum) / n_labelled)


def log_loss(logloss_sum: float, n_labelled: int) -> Value:
    """Mean log loss of the labelled predictions; undefined when nothing is labelled."""
    if n_labelled == 0:
        return Value.undefined(NOTHING_LABELLED)
    return Value(float(logloss_sum) / n_labelled)


def ece_arrays(
    hist_pos: np.ndarray, ssum_pos: np.ndarray, hist_neg: np.ndarray, ssum_neg: np.ndarray
) -> np.ndarray:
    """ECE of many windows (rows of 100-bin arrays); NaN where nothing is labelled."""
    shape = (*np.shape(hist_pos)[:-1], ECE_BINS, -1)
    counts = np.reshape(np.add(hist_pos, hist_neg), shape).sum(axis=-1)
    positives = np.reshape(hist_pos, shape).sum(axis=-1)
    score_sums = np.reshape(np.add(ssum_pos, ssum_neg), shape).sum(axis=-1)
    total = counts.sum(axis=-1)
    # |sum p - positives| / N is n_j/N * |mean p - share|, and needs no division by n_j = 0.
    gaps = np.abs(score_sums - positives).sum(axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(total == 0, np.nan, gaps / total)


def ece(
    hist_pos: np.ndarray, ssum_pos: np.ndarray, hist_neg: np.ndarray, ssum_neg: np.ndarray
) -> Value:
    """Expected calibration error on 10 equal-width bins (see the module docstring)."""
    value = float(ece_arrays(hist_pos, ssum_pos, hist_neg, ssum_neg))
    if value != value:
        return Value.undefined(NOTHING_LABELLED)
    return Value(value)
