"""ROC AUC and average precision from the per-class score histograms.

A histogram keeps 100 equal-width bins [k/100, (k+1)/100), the last closed at 1; a score's
bin is `score_bin(p) = min(int(p * 100), 99)`. Scores that share a bin are treated as tied,
so both measures equal what scikit-learn gives on the bin indices. Against the raw scores the
error is bounded by the pairs (AUC) or positives (AP) that share a bin; `auc_binning_bound`
and `ap_binning_bound` compute those bounds from the histograms themselves.
"""

from __future__ import annotations

import numpy as np

from belated.stats.intervals import hanley_mcneil
from belated.stats.measures import NO_ACTUAL_NEGATIVES, NO_ACTUAL_POSITIVES
from belated.stats.values import Value

N_BINS = 100


def score_bin(p: float) -> int:
    """The histogram bin of a score in [0, 1]: min(int(p * 100), 99)."""
    return min(int(p * 100), N_BINS - 1)


def score_bins(scores: np.ndarray) -> np.ndarray:
    """`score_bin` for an array of scores, as int64."""
    return np.minimum((np.asarray(scores, dtype=np.float64) * 100).astype(np.int64), N_BINS - 1)


def _class_totals(hist_pos: np.ndarray, hist_neg: np.ndarray) -> tuple[int, int, str | None]:
    n_pos = int(hist_pos.sum())
    n_neg = int(hist_neg.sum())
    if n_pos == 0:
        return n_pos, n_neg, NO_ACTUAL_POSITIVES
    if n_neg == 0:
        return n_pos, n_neg, NO_ACTUAL_NEGATIVES
    return n_pos, n_neg, None


def roc_auc(
    hist_pos: np.ndarray, hist_neg: np.ndarray, *, z: float | None = None
) -> Value:
    """ROC AUC from the histograms, ties within a bin counted one half.

    With `z` (a normal quantile, see `intervals.z_value`) the value carries the Hanley and
    McNeil (1982) interval. Undefined when either class is absent.
    """
    n_pos, n_neg, reason = _class_totals(hist_pos, hist_neg)
    if reason is not None:
        return Value.undefined(reason)
    neg = hist_neg.astype(np.float64)
    # Negatives strictly below each bin, plus half of those sharing it (Mann-Whitney ties).
    below = np.cumsum(neg) - 0.5 * neg
    auc = float(np.dot(hist_pos.astype(np.float64), below)) / (n_pos * n_neg)
    if z is None:
        return Value(auc)
    low, high = hanley_mcneil(auc, n_pos, n_neg, z)
    return Value(auc, low, high)


def average_precision(hist_pos: np.ndarray, hist_neg: np.ndarray) -> Value:
    """Average precision, sum over thresholds of (recall step) x precision, from histograms."""
    n_pos, _, reason = _class_totals(hist_pos, hist_neg)
    if reason is not None:
        return Value.undefined(reason)
    pos = hist_pos.astype(np.float64)
    # Counts at or above each bin edge, i.e. predicted positive at threshold k/100.
    tp = np.cumsum(pos[::-1])[::-1]
    flagged = tp + np.cumsum(hist_neg[::-1].astype(np.float64))[::-1]
    hit = pos > 0
    # Where a bin holds a positive, flagged >= tp > 0, so the division is safe.
    return Value(float(np.dot(pos[hit], tp[hit] / flagged[hit])) / n_pos)


def auc_binning_bound(hist_pos: np.ndarray, hist_neg: np.ndarray) -> float:
    """Largest possible |AUC(histogram) - AUC(raw scores)|: half the pairs sharing a bin."""
    n_pos, n_neg = int(hist_pos.sum()), int(hist_neg.sum())
    shared = float(np.dot(hist_pos.astype(np.float64), hist_neg.astype(np.float64)))
    return 0.5 * shared / (n_pos * n_neg)


def ap_binning_bound(hist_pos: np.ndarray, hist_neg: np.ndarray) -> float:
    """Largest possible |AP(histogram) - AP(raw scores)| given the histograms.

    A positive in bin k sees, at its own raw threshold, a precision a / (a + f) with
    a in [TP above k + 1, TP from k] and f in [FP above k, FP from k]; the histogram uses
    TP from k / flagged from k, which lies in that range, so the error per positive is at
    most the width of the range.
    """
    pos = hist_pos.astype(np.float64)
    neg = hist_neg.astype(np.float64)
    n_pos = pos.sum()
    tp_from = np.cumsum(pos[::-1])[::-1]
    fp_from = np.cumsum(neg[::-1])[::-1]
    tp_above = tp_from - pos
    fp_above = fp_from - neg
    hit = pos > 0
    lowest = (tp_above[hit] + 1) / (tp_above[hit] + 1 + fp_from[hit])
    highest = tp_from[hit] / (tp_from[hit] + fp_above[hit])
    return float(np.dot(pos[hit], highest - lowest)) / n_pos
