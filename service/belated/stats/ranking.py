"""ROC AUC and average precision from the per-class score histograms.

A histogram keeps 100 equal-width bins [k/100, (k+1)/100), the last closed at 1: a score s is
in bin k exactly when `s >= k/100` and not `s >= (k+1)/100` (k/100 the correctly rounded
float), so a bin edge decides as a threshold does. `int(s * 100)` alone would not: 0.29 * 100
is 28.999999999999996, one bin low. Scores that share a bin are treated as tied,
so both measures equal what scikit-learn gives on the bin indices. Against the raw scores the
error is bounded by the pairs (AUC) or positives (AP) that share a bin; `auc_binning_bound`
and `ap_binning_bound` compute those bounds from the histograms themselves.
"""

from __future__ import annotations

import math

import numpy as np

from belated.stats.delong import delong_arrays, delong_interval_arrays
from belated.stats.measures import NO_ACTUAL_NEGATIVES, NO_ACTUAL_POSITIVES
from belated.stats.values import Value

N_BINS = 100
# The bin edges k/100 as Python and numpy compute them (one correctly rounded division).
EDGES: tuple[float, ...] = tuple(k / N_BINS for k in range(N_BINS + 1))
_EDGES = np.array(EDGES)


def score_bin(p: float) -> int:
    """The histogram bin k of a score in [0, 1]: k/100 <= p < (k+1)/100, the last bin closed."""
    # p * 100 is within one rounding of the true product, so its floor is off by at most
    # one; comparing with the two neighbouring edges settles it as `p >= k/100` would.
    k = min(max(int(math.floor(p * N_BINS)), 0), N_BINS - 1)
    if p < EDGES[k]:
        return max(k - 1, 0)
    if p >= EDGES[k + 1]:
        return min(k + 1, N_BINS - 1)
    return k


def score_bins(scores: np.ndarray) -> np.ndarray:
    """`score_bin` for an array of scores, as int64."""
    p = np.asarray(scores, dtype=np.float64)
    k = np.clip(np.floor(p * N_BINS), 0, N_BINS - 1).astype(np.int64)
    k -= p < _EDGES[k]
    k += p >= _EDGES[k + 1]
    return np.clip(k, 0, N_BINS - 1)


def _reason(n_pos: float, n_neg: float) -> str | None:
    if n_pos == 0:
        return NO_ACTUAL_POSITIVES
    if n_neg == 0:
        return NO_ACTUAL_NEGATIVES
    return None


def ranking_arrays(hist_pos: np.ndarray, hist_neg: np.ndarray) -> dict[str, np.ndarray]:
    """AUC, average precision and class totals of many windows (rows of 100-bin histograms).

    AUC counts a positive and a negative in the same bin as a tie (one half); average
    precision is the sum over thresholds of the recall step times the precision there.
    Both are NaN for a window without positives or without negatives.
    """
    pos = np.asarray(hist_pos, dtype=np.float64)
    neg = np.asarray(hist_neg, dtype=np.float64)
    cum_pos = np.cumsum(pos, axis=-1)
    cum_neg = np.cumsum(neg, axis=-1)
    n_pos = cum_pos[..., -1]
    n_neg = cum_neg[..., -1]
    # Counts at or above each bin edge, i.e. called positive at threshold k/100.
    tp_from = n_pos[..., None] - cum_pos + pos
    flagged_from = tp_from + (n_neg[..., None] - cum_neg + neg)
    with np.errstate(divide="ignore", invalid="ignore"):
        # Negatives strictly below each bin, plus half of those sharing it (Mann-Whitney ties).
        auc = (pos * (cum_neg - 0.5 * neg)).sum(axis=-1) / (n_pos * n_neg)
        # Where a bin holds a positive, flagged_from >= tp_from > 0; elsewhere pos = 0.
        precision_from = np.where(pos > 0, tp_from / flagged_from, 0.0)
        ap = (pos * precision_from).sum(axis=-1) / n_pos
    undefined = (n_pos == 0) | (n_neg == 0)
    return {
        "roc_auc": np.where(undefined, np.nan, auc),
        "average_precision": np.where(undefined, np.nan, ap),
        "n_pos": n_pos,
        "n_neg": n_neg,
    }


def ranking_measures(
    hist_pos: np.ndarray, hist_neg: np.ndarray, *, z: float | None = None
) -> tuple[Value, Value]:
    """(ROC AUC, average precision) of one window; with `z`, AUC's DeLong interval.

    The interval is the logit-scale DeLong interval (`belated.stats.delong`); none when a
    class has a single member.
    """
    arrays = ranking_arrays(np.asarray(hist_pos)[None, :], np.asarray(hist_neg)[None, :])
    reason = _reason(float(arrays["n_pos"][0]), float(arrays["n_neg"][0]))
    if reason is not None:
        return Value.undefined(reason), Value.undefined(reason)
    auc = float(arrays["roc_auc"][0])
    ap = Value(float(arrays["average_precision"][0]))
    if z is None:
        return Value(auc), ap
    variance = delong_arrays(np.asarray(hist_pos)[None, :], np.asarray(hist_neg)[None, :])
    low, high = delong_interval_arrays(arrays["roc_auc"], variance["variance"], z)
    if math.isnan(float(low[0])):
        return Value(auc), ap
    return Value(auc, float(low[0]), float(high[0])), ap


def roc_auc(hist_pos: np.ndarray, hist_neg: np.ndarray, *, z: float | None = None) -> Value:
    """ROC AUC from the histograms (ties in a bin count one half); with `z`, its interval."""
    return ranking_measures(hist_pos, hist_neg, z=z)[0]


def average_precision(hist_pos: np.ndarray, hist_neg: np.ndarray) -> Value:
    """Average precision from the histograms: sum of (recall step) x precision."""
    return ranking_measures(hist_pos, hist_neg)[1]


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
    return float(np.dot(pos[hit], highest - lowest)) / float(n_pos)
