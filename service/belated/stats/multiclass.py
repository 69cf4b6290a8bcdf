"""Multiclass measures from a K x K confusion matrix (rows actual, columns predicted).

Per class k (one against the rest): TP = M[k, k], FP = column sum - TP, FN = row sum - TP,
giving precision, recall and F-beta. Averages: macro (plain mean over classes), weighted
(weights = support, the actual count of each class) and micro (the measure of the summed
counts; for single-label data micro precision = micro recall = accuracy). A class whose
measure is undefined is left out of the macro and weighted averages and named in their
reason; scikit-learn instead counts it as 0 (its `zero_division` setting).

Intervals: the chosen proportion interval for accuracy, micro precision and recall and the
per-class precision and recall; a seeded multinomial bootstrap of the K x K cells for
every F-beta and for the macro and weighted precision and recall.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from belated.stats.bootstrap import (
    DEFAULT_RESAMPLES,
    Interval,
    attach,
    check_resamples,
    generator_for,
    percentile_interval,
    resample,
)
from belated.stats.fbeta import FBETA_UNDEFINED, fbeta_from_counts, resolve_beta
from belated.stats.intervals import check_confidence, check_method, proportion_interval
from belated.stats.measures import NO_ACTUAL_POSITIVES, NO_PREDICTED_POSITIVES, NOTHING_LABELLED
from belated.stats.values import Value

PER_CLASS = ("precision", "recall", "fbeta")
AVERAGES = ("macro", "micro", "weighted")
MULTICLASS_MEASURES: tuple[str, ...] = ("accuracy",) + tuple(
    f"{m}_{a}" for m in PER_CLASS for a in AVERAGES
)


def _per_class_arrays(m: np.ndarray, beta: float) -> dict[str, np.ndarray]:
    """Per-class precision, recall, F-beta over the last two axes of m; NaN where undefined."""
    tp = np.diagonal(m, axis1=-2, axis2=-1)
    predicted = m.sum(axis=-2)
    actual = m.sum(axis=-1)
    b2 = beta * beta
    with np.errstate(divide="ignore", invalid="ignore"):
        return {
            "precision": tp / predicted,
            "recall": tp / actual,
            "fbeta": (1 + b2) * tp / ((1 + b2) * tp + b2 * (actual - tp) + (predicted - tp)),
            "support": actual,
        }


def _averages(per_class: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Macro and weighted averages over the class axis, leaving out NaN classes."""
    out: dict[str, np.ndarray] = {}
    support = per_class["support"]
    for name in PER_CLASS:
        values = per_class[name]
        defined = np.isfinite(values)
        filled = np.where(defined, values, 0.0)
        weights = np.where(defined, support, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            out[f"{name}_macro"] = filled.sum(axis=-1) / defined.sum(axis=-1)
            out[f"{name}_weighted"] = (filled * weights).sum(axis=-1) / weights.sum(axis=-1)
    return out


def _check_matrix(matrix: np.ndarray, classes: list[str]) -> np.ndarray:
    m = np.asarray(matrix)
    k = len(classes)
    if m.shape != (k, k) or k < 2:
        raise ValueError(f"matrix must be K x K with K = len(classes) >= 2, got {m.shape}")
    if np.any(m < 0) or not np.all(np.equal(np.mod(m, 1), 0)):
        raise ValueError("matrix cells must be non-negative integer counts")
    return m.astype(np.int64)


def _reason_left_out(classes: list[str], reasons: list[str | None]) -> str | None:
    left_out = [f"{c} ({r})" for c, r in zip(classes, reasons, strict=True) if r is not None]
    return "left out: " + ", ".join(left_out) if left_out else None


def summarise_multiclass(
    matrix: np.ndarray,
    classes: list[str],
    *,
    beta: float = 1.0,
    interval: str = "wilson",
    confidence: float = 0.95,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = 0,
) -> dict[str, Any]:
    """Accuracy, per-class and averaged precision, recall and F-beta of a K x K matrix."""
    beta = resolve_beta(beta)
    method = check_method(interval)
    confidence = check_confidence(confidence)
    resamples = check_resamples(resamples)
    m = _check_matrix(matrix, classes)
    total = int(m.sum())
    tp = np.diagonal(m)
    predicted = m.sum(axis=0)
    actual = m.sum(axis=1)
    point = _per_class_arrays(m.astype(np.float64), beta)
    boot = _bootstrap(m, beta, confidence, resamples, seed)

    def prop(successes: int, n: int, reason: str) -> Value:
        """successes / n with its proportion interval, or undefined when n = 0."""
        if n == 0:
            return Value.undefined(reason)
        low, high = proportion_interval(successes, n, method=method, confidence=confidence)
        return Value(successes / n, low, high)

    per_class: dict[str, dict[str, Value]] = {}
    for k, cls in enumerate(classes):
        f = fbeta_from_counts(int(tp[k]), int(predicted[k] - tp[k]), int(actual[k] - tp[k]), beta)
        per_class[cls] = {
            "precision": prop(int(tp[k]), int(predicted[k]), NO_PREDICTED_POSITIVES),
            "recall": prop(int(tp[k]), int(actual[k]), NO_ACTUAL_POSITIVES),
            "fbeta": attach(
                Value.undefined(FBETA_UNDEFINED) if f is None else Value(f), boot.get(f"fbeta/{k}")
            ),
        }

    trace = int(tp.sum())
    measures: dict[str, Value] = {"accuracy": prop(trace, total, NOTHING_LABELLED)}
    averages = _averages(point)
    for name in PER_CLASS:
        reason = _reason_left_out(classes, [per_class[c][name].reason for c in classes])
        for kind in ("macro", "weighted"):
            key = f"{name}_{kind}"
            value = float(averages[key])
            if np.isfinite(value):
                measures[key] = attach(Value(value, reason=reason), boot.get(key))
            else:
                measures[key] = Value.undefined(reason or "no class with a defined value")
        if name == "fbeta":
            micro = fbeta_from_counts(trace, total - trace, total - trace, beta)
            measures[f"{name}_micro"] = attach(
                Value.undefined(FBETA_UNDEFINED) if micro is None else Value(micro),
                boot.get("fbeta_micro"),
            )
        else:
            # Every wrong prediction is one class's FP and another's FN: micro P = R = accuracy.
            measures[f"{name}_micro"] = prop(trace, total, NOTHING_LABELLED)

    return {
        "confusion": {"classes": list(classes), "matrix": m.tolist()},
        "measures": {name: measures[name].to_dict() for name in MULTICLASS_MEASURES},
        "per_class": {
            cls: {name: v.to_dict() for name, v in values.items()}
            for cls, values in per_class.items()
        },
    }


def _bootstrap(
    m: np.ndarray, beta: float, confidence: float, resamples: int, seed: int
) -> dict[str, Interval]:
    """Percentile intervals from multinomial redraws of the K x K cells."""
    cells = m.ravel()
    if resamples == 0 or cells.sum() == 0:
        return {}
    k = m.shape[0]
    draws = resample(cells, resamples, generator_for(cells, seed)).reshape(resamples, k, k)
    per_class = _per_class_arrays(draws, beta)
    out: dict[str, Interval] = {
        key: percentile_interval(values, confidence) for key, values in _averages(per_class).items()
    }
    for j in range(k):
        out[f"fbeta/{j}"] = percentile_interval(per_class["fbeta"][:, j], confidence)
    trace = np.trace(draws, axis1=1, axis2=2)
    wrong = draws.sum(axis=(1, 2)) - trace
    b2 = beta * beta
    with np.errstate(divide="ignore", invalid="ignore"):
        micro = (1 + b2) * trace / ((1 + b2) * trace + b2 * wrong + wrong)
    out["fbeta_micro"] = percentile_interval(micro, confidence)
    return out
