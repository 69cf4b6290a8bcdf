"""Binary measures from confusion counts: point values, or None with a reason.

Counts are over labelled predictions (implied negatives count as actual negative), except
`positive_rate`, which is over all predictions, labelled or not. A zero denominator never
gives 0, NaN or an exception: it gives an undefined `Value` saying what was missing.
"""

from __future__ import annotations

import math

from belated.stats.fbeta import FBETA_UNDEFINED as FBETA_UNDEFINED
from belated.stats.fbeta import fbeta_from_counts
from belated.stats.values import Value, ratio

NO_PREDICTED_POSITIVES = "no predicted positives"
NO_PREDICTED_NEGATIVES = "no predicted negatives"
NO_ACTUAL_POSITIVES = "no actual positives"
NO_ACTUAL_NEGATIVES = "no actual negatives"
NOTHING_LABELLED = "nothing labelled"
NO_PREDICTIONS = "no predictions"

# The order of the measures table in DESIGN.md; summaries list measures in this order.
BINARY_MEASURES: tuple[str, ...] = (
    "precision",
    "recall",
    "fbeta",
    "accuracy",
    "specificity",
    "npv",
    "balanced_accuracy",
    "mcc",
    "positive_rate",
    "prevalence",
    "roc_auc",
    "average_precision",
    "brier",
    "log_loss",
    "ece",
)


def precision(tp: int, fp: int) -> Value:
    """TP / (TP + FP); undefined with no predicted positives."""
    return ratio(tp, tp + fp, NO_PREDICTED_POSITIVES)


def recall(tp: int, fn: int) -> Value:
    """TP / (TP + FN); undefined with no actual positives."""
    return ratio(tp, tp + fn, NO_ACTUAL_POSITIVES)


def specificity(tn: int, fp: int) -> Value:
    """TN / (TN + FP); undefined with no actual negatives."""
    return ratio(tn, tn + fp, NO_ACTUAL_NEGATIVES)


def npv(tn: int, fn: int) -> Value:
    """Negative predictive value TN / (TN + FN); undefined with no predicted negatives."""
    return ratio(tn, tn + fn, NO_PREDICTED_NEGATIVES)


def accuracy(tp: int, fp: int, fn: int, tn: int) -> Value:
    """(TP + TN) / labelled; undefined when nothing is labelled."""
    return ratio(tp + tn, tp + fp + fn + tn, NOTHING_LABELLED)


def prevalence(tp: int, fp: int, fn: int, tn: int) -> Value:
    """Actual positives / labelled; undefined when nothing is labelled."""
    return ratio(tp + fn, tp + fp + fn + tn, NOTHING_LABELLED)


def positive_rate(n_pred_pos: int, n_pred: int) -> Value:
    """Predicted positives / all predictions (labelled or not); undefined with none."""
    return ratio(n_pred_pos, n_pred, NO_PREDICTIONS)


def balanced_accuracy(tp: int, fp: int, fn: int, tn: int) -> Value:
    """The mean of recall and specificity; undefined unless both classes occur."""
    if tp + fn == 0:
        return Value.undefined(NO_ACTUAL_POSITIVES)
    if tn + fp == 0:
        return Value.undefined(NO_ACTUAL_NEGATIVES)
    return Value(0.5 * (tp / (tp + fn) + tn / (tn + fp)))


def mcc(tp: int, fp: int, fn: int, tn: int) -> Value:
    """Matthews correlation coefficient; undefined when a margin of the matrix is empty."""
    margins = (
        (tp + fp, NO_PREDICTED_POSITIVES),
        (tn + fn, NO_PREDICTED_NEGATIVES),
        (tp + fn, NO_ACTUAL_POSITIVES),
        (tn + fp, NO_ACTUAL_NEGATIVES),
    )
    for size, reason in margins:
        if size == 0:
            return Value.undefined(reason)
    # Python ints keep the product exact; one sqrt of a product is more accurate than four.
    denominator = math.sqrt((tp + fp) * (tn + fn) * (tp + fn) * (tn + fp))
    return Value((tp * tn - fp * fn) / denominator)


def fbeta_value(tp: int, fp: int, fn: int, beta: float) -> Value:
    """F-beta of counts for an already-resolved beta (see `fbeta.resolve_beta`)."""
    value = fbeta_from_counts(tp, fp, fn, beta)
    if value is None:
        return Value.undefined(FBETA_UNDEFINED)
    return Value(value)


def binary_measures(
    tp: int,
    fp: int,
    fn: int,
    tn: int,
    *,
    beta: float = 1.0,
    n_pred_pos: int | None = None,
    n_pred: int | None = None,
) -> dict[str, Value]:
    """Every count-based binary measure as a point value (no intervals).

    `positive_rate` uses `n_pred_pos` / `n_pred` when given (all predictions), otherwise
    the labelled predictions alone.
    """
    if n_pred is None or n_pred_pos is None:
        n_pred_pos, n_pred = tp + fp, tp + fp + fn + tn
    return {
        "precision": precision(tp, fp),
        "recall": recall(tp, fn),
        "fbeta": fbeta_value(tp, fp, fn, beta),
        "accuracy": accuracy(tp, fp, fn, tn),
        "specificity": specificity(tn, fp),
        "npv": npv(tn, fn),
        "balanced_accuracy": balanced_accuracy(tp, fp, fn, tn),
        "mcc": mcc(tp, fp, fn, tn),
        "positive_rate": positive_rate(n_pred_pos, n_pred),
        "prevalence": prevalence(tp, fp, fn, tn),
    }
