"""F-beta in its two spellings: the weight beta of recall, or the precision weight alpha.

van Rijsbergen (1979, Information Retrieval, 2nd ed., ch. 7) writes the effectiveness
measure as a weighted harmonic mean of precision P and recall R,

    F = 1 / (alpha / P + (1 - alpha) / R),

and the same number in counts, with beta the relative importance of recall, is

    F = (1 + beta^2) TP / ((1 + beta^2) TP + beta^2 FN + FP).

The two agree when alpha = 1 / (1 + beta^2), i.e. beta = sqrt((1 - alpha) / alpha):

    beta = 2   (recall weighs more)     <->  alpha = 0.2
    beta = 1   (F1, the plain mean)     <->  alpha = 0.5
    beta = 0.5 (precision weighs more)  <->  alpha = 0.8

People are taught both and mix them up (an alpha of 0.5 is not a beta of 0.5), so every
entry point takes one or the other, never both, and `resolve_beta` turns either into beta.
"""

from __future__ import annotations

import math
from numbers import Real

from belated.stats.values import Value

FBETA_UNDEFINED = "no predicted or actual positives"


def precision_weight_from_beta(beta: float) -> float:
    """The precision weight alpha = 1 / (1 + beta^2) that gives the same F as `beta`."""
    return 1.0 / (1.0 + beta * beta)


def beta_from_precision_weight(precision_weight: float) -> float:
    """The beta = sqrt((1 - alpha) / alpha) that gives the same F as precision weight alpha."""
    return math.sqrt((1.0 - precision_weight) / precision_weight)


def resolve_beta(beta: float | None = None, precision_weight: float | None = None) -> float:
    """Beta from either spelling (default 1); ValueError for both, or for an invalid one."""
    if beta is not None and precision_weight is not None:
        raise ValueError(
            "give either beta or precision_weight, not both "
            "(precision_weight alpha = 1 / (1 + beta^2))"
        )
    if precision_weight is not None:
        if isinstance(precision_weight, bool) or not isinstance(precision_weight, Real):
            raise ValueError("precision_weight must be a number in the open interval (0, 1)")
        if not math.isfinite(precision_weight) or not 0.0 < precision_weight < 1.0:
            raise ValueError(
                f"precision_weight must lie in the open interval (0, 1), got {precision_weight}"
            )
        return beta_from_precision_weight(float(precision_weight))
    if beta is None:
        return 1.0
    if isinstance(beta, bool) or not isinstance(beta, Real):
        raise ValueError("beta must be a positive finite number")
    if not math.isfinite(beta) or beta <= 0.0:
        raise ValueError(f"beta must be a positive finite number, got {beta}")
    return float(beta)


def fbeta_from_counts(tp: float, fp: float, fn: float, beta: float) -> float | None:
    """F-beta from counts in the standard form; None when TP + FP + FN = 0."""
    b2 = beta * beta
    denominator = (1.0 + b2) * tp + b2 * fn + fp
    if denominator == 0:
        return None
    # TP = 0 with FP + FN > 0 is a real 0: the classifier found none of what it had to find.
    return (1.0 + b2) * tp / denominator


def fbeta_from_pr(
    precision: float,
    recall: float,
    *,
    beta: float | None = None,
    precision_weight: float | None = None,
) -> float:
    """F as the weighted harmonic mean 1 / (alpha/P + (1-alpha)/R) of precision and recall."""
    alpha = precision_weight_from_beta(resolve_beta(beta, precision_weight))
    if precision == 0.0 or recall == 0.0:
        # The harmonic mean's limit: one component at 0 drags F to 0.
        return 0.0
    return 1.0 / (alpha / precision + (1.0 - alpha) / recall)


def fbeta(
    tp: int,
    fp: int,
    fn: int,
    *,
    beta: float | None = None,
    precision_weight: float | None = None,
) -> Value:
    """F-beta of confusion counts, with beta or the precision weight (not both)."""
    value = fbeta_from_counts(tp, fp, fn, resolve_beta(beta, precision_weight))
    if value is None:
        return Value.undefined(FBETA_UNDEFINED)
    return Value(value)
