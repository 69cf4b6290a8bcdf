"""Label-free estimates from scores alone; they hold only for calibrated scores.

Expected confusion matrix: if p is the calibrated probability that a prediction is
positive, each predicted positive adds p to the expected TP and 1 - p to the expected FP,
and each predicted negative adds p to the expected FN and 1 - p to the expected TN. The
measures of that matrix estimate precision, recall and F-beta before any label arrives.

Positive prior under a prior shift: EM re-estimation of Saerens, Latinne and Decaestecker
(2002, Neural Computation 14(1):21-41). With the training prior pi_t and a guess pi, every
posterior is re-weighted by Bayes' rule,

    p' = (pi / pi_t) p / ((pi / pi_t) p + ((1 - pi) / (1 - pi_t)) (1 - p)),

and the new guess is the mean of p'; the fixed point is the maximum-likelihood prior of the
unlabelled window. Here it runs on the 100-bin histogram of all scores with each bin's mean
score (sum / count) standing for the scores in it.

Implied measures under a prior shift (`implied_measures`): the posteriors are first moved to
the window's EM prior by the same Bayes re-weighting, with the reference prevalence as the
training prior, and the expected confusion matrix is summed from the adjusted posteriors:
over the bins predicted positive (at or above the threshold's bin) expected TP = sum of
count x p', FP = sum of count x (1 - p'), and FN, TN likewise over the other bins. Each bin's
mean score is adjusted in place of its scores; p' is smooth in p, so over a bin 0.01 wide the
difference is of the second order.
"""

from __future__ import annotations

import math

import numpy as np

from belated.stats.fbeta import fbeta_from_counts
from belated.stats.measures import FBETA_UNDEFINED, NO_PREDICTIONS
from belated.stats.memo import Memo, digest
from belated.stats.ranking import N_BINS
from belated.stats.values import Value, ratio


def expected_measures(
    exp_tp: float, exp_fp: float, exp_fn: float, exp_tn: float, *, beta: float = 1.0
) -> dict[str, Value]:
    """Precision, recall, F-beta and prevalence of the expected confusion matrix."""
    total = exp_tp + exp_fp + exp_fn + exp_tn
    if total == 0:
        undefined = Value.undefined(NO_PREDICTIONS)
        return dict.fromkeys(("precision", "recall", "fbeta", "prevalence"), undefined)
    f = fbeta_from_counts(exp_tp, exp_fp, exp_fn, beta)
    return {
        "precision": ratio(exp_tp, exp_tp + exp_fp, "no predicted positives"),
        "recall": ratio(exp_tp, exp_tp + exp_fn, "no expected positives"),
        "fbeta": Value.undefined(FBETA_UNDEFINED) if f is None else Value(f),
        "prevalence": Value((exp_tp + exp_fn) / total),
    }


def expected_confusion(
    scores: np.ndarray, predicted_pos: np.ndarray
) -> tuple[float, float, float, float]:
    """(expected TP, FP, FN, TN) of raw scores and predicted labels (the reference form)."""
    p = np.asarray(scores, dtype=np.float64)
    flagged = np.asarray(predicted_pos, dtype=bool)
    exp_tp = float(p[flagged].sum())
    exp_fn = float(p[~flagged].sum())
    return exp_tp, float(flagged.sum()) - exp_tp, exp_fn, float((~flagged).sum()) - exp_fn


def em_prior(
    hist_all: np.ndarray,
    ssum_all: np.ndarray,
    train_prior: float,
    *,
    tol: float = 1e-9,
    max_iter: int = 1000,
) -> float | None:
    """The window's positive prior re-estimated by EM (Saerens et al. 2002).

    None when there are no predictions, or the training prior is not inside (0, 1).
    """
    counts = np.asarray(hist_all, dtype=np.float64)
    total = counts.sum()
    if total == 0 or not math.isfinite(train_prior) or not 0.0 < train_prior < 1.0:
        return None
    filled = counts > 0
    weights = counts[filled] / total
    p = np.clip(np.asarray(ssum_all, dtype=np.float64)[filled] / counts[filled], 0.0, 1.0)
    prior = float(np.dot(weights, p))
    for _ in range(max_iter):
        if prior <= 0.0 or prior >= 1.0:
            # Every score at 0 (or 1): the window is all negative (positive), a fixed point.
            return prior
        up = prior / train_prior * p
        down = (1.0 - prior) / (1.0 - train_prior) * (1.0 - p)
        updated = float(np.dot(weights, up / (up + down)))
        if abs(updated - prior) < tol:
            return updated
        prior = updated
    return prior


def first_positive_bin(threshold: float) -> int:
    """The first score bin predicted positive: bins whose lower edge k/100 is at or above
    `threshold` (exact for thresholds on the bin edges, as the threshold sweep uses)."""
    if math.isnan(threshold):
        raise ValueError("threshold must be a number")
    return int(min(N_BINS, max(0, math.ceil(threshold * N_BINS - 1e-9))))


def em_adjusted_posteriors(
    hist_all: np.ndarray,
    ssum_all: np.ndarray,
    train_prior: float,
    *,
    tol: float = 1e-9,
    max_iter: int = 1000,
) -> tuple[np.ndarray, float] | None:
    """Each bin's mean score moved to the window's EM prior, and that prior.

    None when there are no predictions or the training prior is not inside (0, 1). Empty
    bins get 0 (they carry no weight).
    """
    prior = em_prior(hist_all, ssum_all, train_prior, tol=tol, max_iter=max_iter)
    if prior is None:
        return None
    counts = np.asarray(hist_all, dtype=np.float64)
    filled = counts > 0
    p = np.where(
        filled,
        np.clip(np.asarray(ssum_all, dtype=np.float64) / np.where(filled, counts, 1.0), 0, 1),
        0.0,
    )
    up = prior / train_prior * p
    down = (1.0 - prior) / (1.0 - train_prior) * (1.0 - p)
    with np.errstate(invalid="ignore", divide="ignore"):
        adjusted = np.where(up + down > 0, up / (up + down), p)
    return np.where(filled, adjusted, 0.0), prior


def em_expected_confusion(
    hist_all: np.ndarray, ssum_all: np.ndarray, threshold: float, train_prior: float
) -> tuple[float, float, float, float] | None:
    """(expected TP, FP, FN, TN) from the posteriors adjusted to the window's EM prior.

    The histogram form of `expected_confusion`: bins at or above `first_positive_bin`
    are predicted positive. None as for `em_adjusted_posteriors`.
    """
    found = em_adjusted_posteriors(hist_all, ssum_all, train_prior)
    if found is None:
        return None
    adjusted, _ = found
    counts = np.asarray(hist_all, dtype=np.float64)
    cut = first_positive_bin(threshold)
    exp_tp = float(np.dot(counts[cut:], adjusted[cut:]))
    exp_fn = float(np.dot(counts[:cut], adjusted[:cut]))
    return exp_tp, float(counts[cut:].sum()) - exp_tp, exp_fn, float(counts[:cut].sum()) - exp_fn


def implied_measures(
    hist_all: np.ndarray,
    ssum_all: np.ndarray,
    threshold: float,
    train_prior: float,
    *,
    beta: float = 1.0,
) -> dict[str, Value]:
    """Implied precision, recall, F-beta and prevalence after the EM prior adjustment.

    Undefined (with the reason) when there are no predictions or no valid training prior.
    """
    counts = em_expected_confusion(hist_all, ssum_all, threshold, train_prior)
    if counts is None:
        reason = (
            NO_PREDICTIONS
            if float(np.asarray(hist_all, dtype=np.float64).sum()) == 0
            else "no reference prevalence inside (0, 1)"
        )
        return dict.fromkeys(
            ("precision", "recall", "fbeta", "prevalence"), Value.undefined(reason)
        )
    return expected_measures(*counts, beta=beta)


def em_prior_many(
    hists: np.ndarray,
    ssums: np.ndarray,
    train_priors: np.ndarray,
    *,
    tol: float = 1e-9,
    max_iter: int = 1000,
) -> list[float | None]:
    """`em_prior` for many windows at once (rows of `hists` and `ssums`).

    The same iteration runs for every window side by side; a window stops when its own
    step is below `tol`, so each answer is what `em_prior` gives alone (up to the order of
    floating-point summation).
    """
    if not len(train_priors):
        return []
    counts = np.asarray(hists, dtype=np.float64).reshape(len(train_priors), -1)
    sums = np.asarray(ssums, dtype=np.float64).reshape(counts.shape)
    base = np.asarray(train_priors, dtype=np.float64)
    # NaN never equals itself: spell it, so that an undefined prior is one key, not many
    keys = [
        (digest(counts[i], sums[i]), repr(float(base[i])), tol, max_iter) for i in range(len(base))
    ]
    known = [_EM_MEMO.get(key) for key in keys]
    todo = [i for i, (found, _) in enumerate(known) if not found]
    fresh = _em_many(counts[todo], sums[todo], base[todo], tol, max_iter) if todo else []
    for i, value in zip(todo, fresh, strict=True):
        _EM_MEMO.put(keys[i], value)
        known[i] = (True, value)
    return [value for _, value in known]


_EM_MEMO = Memo(50_000)


def _em_many(
    counts: np.ndarray, sums: np.ndarray, base: np.ndarray, tol: float, max_iter: int
) -> list[float | None]:
    total = counts.sum(axis=1)
    with np.errstate(invalid="ignore"):
        valid = (total > 0) & np.isfinite(base) & (base > 0.0) & (base < 1.0)
    out: list[float | None] = [None] * len(base)
    idx = np.flatnonzero(valid)
    if not idx.size:
        return out
    c = counts[idx]
    weights = c / total[idx, None]
    filled = c > 0
    p = np.where(filled, np.clip(sums[idx] / np.where(filled, c, 1.0), 0.0, 1.0), 0.0)
    pt = base[idx, None]
    prior = (weights * p).sum(axis=1)
    result = prior.copy()
    active = np.ones(idx.size, dtype=bool)
    for _ in range(max_iter):
        # every score at 0 (or 1): the window is all negative (positive), a fixed point
        active &= (prior > 0.0) & (prior < 1.0)
        if not active.any():
            break
        a = np.flatnonzero(active)
        pr = prior[a, None]
        up = pr / pt[a] * p[a]
        down = (1.0 - pr) / (1.0 - pt[a]) * (1.0 - p[a])
        updated = (weights[a] * (up / (up + down))).sum(axis=1)
        converged = np.abs(updated - prior[a]) < tol
        prior[a] = updated
        result[a] = updated
        active[a[converged]] = False
    for j, i in enumerate(idx):
        out[int(i)] = float(result[j])
    return out
