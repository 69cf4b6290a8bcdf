"""Projected measures: what an unsettled window's measures will be once its labels are in.

Early labels are a biased sample when one class's labels come sooner. Given the window's
hourly cohorts x strata (`belated.stats.strata`) and each class's arrival curve F_c, a
cohort-stratum cell of n predictions holds, in the model used here, a share theta of
positives among its eventually labelled predictions (theta shared by the window's cohorts
within a stratum), a share rho of predictions that will ever be labelled (1 with implied
negatives), and the labels seen so far are

    positives ~ rho theta F_pos(age),  negatives ~ rho (1 - theta) F_neg(age),  rest unlabelled.

The estimator and its Monte Carlo interval are in `belated.stats.completion` (completion of
the unlabelled predictions, chosen over inverse-probability weighting by simulation; the
reasons are given there).

Measures are null, with the reason, when a stratum with predictions lacks a curve, or when a
class's expected share of labels arrived at the window's age (its F averaged over the
window's cells, weighted by the cell's projected members of that class) is below
`min_arrival` (0.05).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from belated.stats.columns import undefined
from belated.stats.completion import fit_theta, resample_final
from belated.stats.fbeta import FBETA_UNDEFINED
from belated.stats.measures import (
    NO_ACTUAL_NEGATIVES,
    NO_ACTUAL_POSITIVES,
    NO_PREDICTED_NEGATIVES,
    NO_PREDICTED_POSITIVES,
    NOTHING_LABELLED,
)
from belated.stats.strata import CLASS_NAMES, Strata

MIN_ARRIVAL = 0.05
DEFAULT_RESAMPLES = 200
# Which counts each projected measure takes, and why it is undefined when they are zero.
PROJECTED: dict[str, str] = {
    "precision": NO_PREDICTED_POSITIVES,
    "recall": NO_ACTUAL_POSITIVES,
    "fbeta": FBETA_UNDEFINED,
    "accuracy": NOTHING_LABELLED,
    "specificity": NO_ACTUAL_NEGATIVES,
    "npv": NO_PREDICTED_NEGATIVES,
    "prevalence": NOTHING_LABELLED,
}


def confusion_of(counts: np.ndarray, predicted_positive: np.ndarray) -> np.ndarray:
    """(..., 4) tp, fp, fn, tn from (..., S, 2) counts per stratum and class."""
    pos = predicted_positive.astype(bool)
    tp = counts[..., pos, 1].sum(axis=-1)
    fp = counts[..., pos, 0].sum(axis=-1)
    fn = counts[..., ~pos, 1].sum(axis=-1)
    tn = counts[..., ~pos, 0].sum(axis=-1)
    return np.stack([tp, fp, fn, tn], axis=-1)


def measure_values(confusion: np.ndarray, beta: float) -> dict[str, np.ndarray]:
    """Every projected measure of (..., 4) confusion counts; NaN where undefined."""
    tp, fp, fn, tn = (confusion[..., i] for i in range(4))
    b2 = beta * beta
    total = tp + fp + fn + tn
    pairs = {
        "precision": (tp, tp + fp),
        "recall": (tp, tp + fn),
        "fbeta": ((1 + b2) * tp, (1 + b2) * tp + b2 * fn + fp),
        "accuracy": (tp + tn, total),
        "specificity": (tn, tn + fp),
        "npv": (tn, tn + fn),
        "prevalence": (tp + fn, total),
    }
    out = {}
    with np.errstate(divide="ignore", invalid="ignore"):
        for name, (num, den) in pairs.items():
            out[name] = np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)
    return out


def project(
    strata: Strata,
    *,
    beta: float = 1.0,
    confidence: float = 0.95,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = 0,
    eventual_coverage: float = 1.0,
    min_arrival: float = MIN_ARRIVAL,
    min_coverage: float | None = None,
    one_class_suffices: bool = False,
) -> dict[str, Any]:
    """Projected measures of one unsettled window, with intervals and the reasons of nulls.

    `eventual_coverage` is the share of predictions that will ever be labelled (1 with
    implied negatives; otherwise the labelled share of settled history). Answers
    {"measures": {name: {"value", "low", "high"[, "reason"]}}, "expected_final_coverage",
    "arrival": {"negative": share, "positive": share}, "arrived_share", "settles_in_hours"}:
    the arrival shares are each class's expected share of labels arrived, `arrived_share`
    the share of all the window's expected labels arrived (the early rules' 30%), "counts"
    (when the measures have values) the projected final tp, fp, fn and tn, and
    `settles_in_hours` how many hours from now until every class's share reaches
    `min_coverage` (0 when it has, None when never or not asked).

    `one_class_suffices`: when the share of predictions labelled at last is known (1 with
    implied negatives, or measured on settled history), a cell's labels still to come are
    its predictions times that share less the labels seen, and one class's arrival
    identifies the cell's share of positives; then the measures are null only when every
    class is below `min_arrival`.
    """
    if not 0.0 < eventual_coverage <= 1.0:
        raise ValueError("eventual_coverage must lie in (0, 1]")
    if not 0.0 < confidence < 1.0:
        raise ValueError("confidence must lie in (0, 1)")
    out: dict[str, Any] = {
        "measures": {},
        "expected_final_coverage": None,
        "arrival": dict.fromkeys(CLASS_NAMES),
        "arrived_share": None,
        "settles_in_hours": None,
    }
    missing = strata.missing_curve()
    if missing is None and not strata.predictions.sum():
        missing = "no predictions"
    if missing is not None:
        out["measures"] = {name: undefined(missing) for name in PROJECTED}
        return out
    f, var = strata.arrival()
    k = strata.labelled.astype(np.float64)
    theta, later = fit_theta(strata.predictions, k, f, eventual_coverage)
    members = _members(strata, theta, eventual_coverage)
    arrival = _class_arrival(f, members)
    out["arrival"] = {name: _float(a) for name, a in zip(CLASS_NAMES, arrival, strict=True)}
    out["expected_final_coverage"] = _final_coverage(strata, f)
    expected = float(members.sum())
    out["arrived_share"] = float((members * f).sum()) / expected if expected > 0 else None
    if min_coverage is not None:
        out["settles_in_hours"] = settles_in_hours(strata, members, min_coverage)
    low_class = [(name, a) for name, a in zip(CLASS_NAMES, arrival, strict=True) if a < min_arrival]
    if one_class_suffices and len(low_class) < len(CLASS_NAMES):
        low_class = []
    if low_class:
        name, a = low_class[0]
        reason = f"too few {name} labels expected by this age ({a:.3f} of them arrived)"
        if one_class_suffices:
            shares = ", ".join(f"{n} {x:.3f}" for n, x in low_class)
            reason = f"too few labels of either class expected by this age ({shares} arrived)"
        out["measures"] = {m: undefined(reason) for m in PROJECTED}
        return out
    counts = confusion_of((k + later).sum(axis=0), strata.predicted_positive)
    out["counts"] = dict(zip(("tp", "fp", "fn", "tn"), map(float, counts), strict=True))
    point = measure_values(counts, beta)
    final = resample_final(strata, f, var, theta, eventual_coverage, resamples, seed)
    draws = measure_values(confusion_of(final, strata.predicted_positive), beta)
    tail = (1.0 - confidence) / 2.0
    for name, reason in PROJECTED.items():
        value = float(point[name])
        if math.isnan(value):
            out["measures"][name] = undefined(reason)
            continue
        finite = draws[name][np.isfinite(draws[name])]
        low, high = (
            (float(np.quantile(finite, tail)), float(np.quantile(finite, 1.0 - tail)))
            if finite.size
            else (None, None)
        )
        out["measures"][name] = {"value": value, "low": low, "high": high}
    return out


def _members(strata: Strata, theta: np.ndarray, rho: float) -> np.ndarray:
    """(H, S, 2) expected eventual labels of each class in each cell."""
    n = strata.predictions.astype(np.float64) * rho
    return np.stack([n * (1.0 - theta[None, :]), n * theta[None, :]], axis=-1)


def _class_arrival(f: np.ndarray, members: np.ndarray) -> list[float]:
    """Each class's expected share of its labels arrived: F weighted by projected members."""
    out = []
    for c in range(2):
        w = members[..., c]
        total = float(w.sum())
        out.append(float((w * f[..., c]).sum() / total) if total > 0 else math.nan)
    return out


def _float(x: float) -> float | None:
    return None if math.isnan(x) else x


def _final_coverage(strata: Strata, f: np.ndarray) -> float | None:
    """Share of predictions expected to be labelled at last: per stratum and class the
    labels seen over the predictions times F (the pooled IPW ratio), capped at 1."""
    n = strata.predictions.astype(np.float64)
    expected = (n[..., None] * f).sum(axis=0)
    seen = strata.labelled.sum(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        phi = np.where(expected > 0, seen / expected, 0.0)
    total = float(n.sum())
    if total == 0 or (expected == 0).all():
        return None
    eventual = float((phi * n.sum(axis=0)[:, None]).sum()) / total
    return min(1.0, eventual)


def settles_in_hours(
    strata: Strata, members: np.ndarray, min_coverage: float, horizon_hours: int = 400 * 24
) -> float | None:
    """Hours from now until every class's expected share of labels arrived reaches
    `min_coverage` (hourly steps); 0 when it has, None when not within `horizon_hours`."""
    if not 0.0 < min_coverage <= 1.0:
        raise ValueError("min_coverage must lie in (0, 1]")
    lo, hi = 0, horizon_hours
    if _reached(strata, members, 0.0, min_coverage):
        return 0.0
    if not _reached(strata, members, float(hi), min_coverage):
        return None
    # F only grows with age, so the first hour that reaches it is found by bisection
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if _reached(strata, members, float(mid), min_coverage):
            hi = mid
        else:
            lo = mid
    return float(hi)


def _reached(strata: Strata, members: np.ndarray, extra: float, min_coverage: float) -> bool:
    f = strata.arrived(extra)
    shares = _class_arrival(f, members)
    return all(math.isnan(a) or a >= min_coverage - 1e-12 for a in shares)
