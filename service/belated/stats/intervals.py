"""Confidence intervals for a proportion, and for ROC AUC.

Proportions: Wilson score (the default), Clopper-Pearson (exact, conservative) and Jeffreys
(equal-tailed Beta(x + 1/2, n - x + 1/2) quantiles with the boundary rule of Brown, Cai and
DasGupta 2001, Statistical Science 16:101-133: the lower limit is 0 when x = 0 and the upper
limit 1 when x = n). ROC AUC: Hanley and McNeil (1982, Radiology 143:29-36), kept for
reference; the windows' AUC interval is DeLong's (`belated.stats.delong`), since Hanley and
McNeil's exponential approximation over-covers (0.96-0.998 at nominal 0.95 by simulation).
"""

from __future__ import annotations

import math
from numbers import Real
from statistics import NormalDist
from typing import Any

import numpy as np
from scipy.special import betaincinv

INTERVAL_METHODS: tuple[str, ...] = ("wilson", "clopper-pearson", "jeffreys")

_STANDARD_NORMAL = NormalDist()


def check_confidence(confidence: float) -> float:
    """The confidence level as a float; ValueError unless it lies in (0, 1)."""
    if isinstance(confidence, bool) or not isinstance(confidence, Real):
        raise ValueError("confidence must be a number in the open interval (0, 1)")
    if not math.isfinite(confidence) or not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must lie in the open interval (0, 1), got {confidence}")
    return float(confidence)


def check_method(method: str) -> str:
    """The interval method; ValueError naming the choices for an unknown one."""
    if method not in INTERVAL_METHODS:
        raise ValueError(f"interval must be one of {', '.join(INTERVAL_METHODS)}; got {method!r}")
    return method


def z_value(confidence: float) -> float:
    """The two-sided standard normal quantile for `confidence` (1.959964 for 0.95)."""
    # The stdlib inverse CDF costs well under a microsecond, so no cache is needed.
    return _STANDARD_NORMAL.inv_cdf(0.5 + check_confidence(confidence) / 2.0)


def wilson(successes: int, n: int, z: float) -> tuple[float, float]:
    """Wilson score interval for successes / n at normal quantile z (n > 0)."""
    p = successes / n
    z2 = z * z
    denominator = 1.0 + z2 / n
    centre = (p + z2 / (2.0 * n)) / denominator
    half = z * math.sqrt(p * (1.0 - p) / n + z2 / (4.0 * n * n)) / denominator
    # At x = 0 or x = n the limit is 0 or 1 exactly; rounding would leave 1e-17 off it.
    low = 0.0 if successes == 0 else max(0.0, centre - half)
    high = 1.0 if successes == n else min(1.0, centre + half)
    return low, high


def clopper_pearson(successes: int, n: int, confidence: float) -> tuple[float, float]:
    """Clopper-Pearson interval from Beta quantiles (n > 0)."""
    tail = (1.0 - confidence) / 2.0
    low = 0.0 if successes == 0 else float(betaincinv(successes, n - successes + 1, tail))
    high = 1.0 if successes == n else float(betaincinv(successes + 1, n - successes, 1.0 - tail))
    return low, high


def jeffreys(successes: int, n: int, confidence: float) -> tuple[float, float]:
    """Jeffreys interval with the Brown-Cai-DasGupta boundary rule (n > 0)."""
    tail = (1.0 - confidence) / 2.0
    a, b = successes + 0.5, n - successes + 0.5
    low = 0.0 if successes == 0 else float(betaincinv(a, b, tail))
    high = 1.0 if successes == n else float(betaincinv(a, b, 1.0 - tail))
    return low, high


def proportion_interval_arrays(
    successes: np.ndarray, n: np.ndarray, *, method: str, confidence: float, z: float
) -> tuple[np.ndarray, np.ndarray]:
    """Elementwise proportion intervals of many proportions at once; NaN where n = 0.

    The same formulas, in the same order of operations, as `wilson`, `clopper_pearson`
    and `jeffreys`, so each element equals the scalar result.
    """
    x = np.asarray(successes, dtype=np.float64)
    trials = np.asarray(n, dtype=np.float64)
    empty = trials == 0
    safe_n = np.where(empty, 1.0, trials)
    if method == "wilson":
        p = x / safe_n
        z2 = z * z
        denominator = 1.0 + z2 / safe_n
        centre = (p + z2 / (2.0 * safe_n)) / denominator
        half = z * np.sqrt(p * (1.0 - p) / safe_n + z2 / (4.0 * safe_n * safe_n)) / denominator
        low, high = np.maximum(0.0, centre - half), np.minimum(1.0, centre + half)
    else:
        tail = (1.0 - confidence) / 2.0
        if method == "clopper-pearson":
            # Arguments nudged off 0 where the boundary rule below overrides the result.
            low = betaincinv(np.maximum(x, 1.0), trials - x + 1.0, tail)
            high = betaincinv(x + 1.0, np.maximum(trials - x, 1.0), 1.0 - tail)
        else:
            low = betaincinv(x + 0.5, trials - x + 0.5, tail)
            high = betaincinv(x + 0.5, trials - x + 0.5, 1.0 - tail)
    low = np.where(x == 0, 0.0, low)
    high = np.where(x == trials, 1.0, high)
    return np.where(empty, np.nan, low), np.where(empty, np.nan, high)


def proportion_interval(
    successes: int, n: int, *, method: str = "wilson", confidence: float = 0.95
) -> tuple[float, float]:
    """Two-sided interval for the proportion successes / n; ValueError for n <= 0."""
    check_method(method)
    confidence = check_confidence(confidence)
    if n <= 0 or successes < 0 or successes > n:
        raise ValueError(f"need 0 <= successes <= n and n > 0, got {successes}/{n}")
    if method == "wilson":
        return wilson(successes, n, z_value(confidence))
    if method == "clopper-pearson":
        return clopper_pearson(successes, n, confidence)
    return jeffreys(successes, n, confidence)


def hanley_mcneil_se(auc: Any, n_pos: Any, n_neg: Any) -> Any:
    """Hanley-McNeil standard error of an AUC from n_pos positives and n_neg negatives.

    Their formula (1982, eq. 1 with the exponential approximations Q1 = A / (2 - A) and
    Q2 = 2A^2 / (1 + A)): SE^2 = [A(1-A) + (n_pos-1)(Q1-A^2) + (n_neg-1)(Q2-A^2)] / (n_pos n_neg).
    Works elementwise on numpy arrays as on floats.
    """
    q1 = auc / (2.0 - auc)
    q2 = 2.0 * auc * auc / (1.0 + auc)
    a2 = auc * auc
    variance = (auc * (1.0 - auc) + (n_pos - 1) * (q1 - a2) + (n_neg - 1) * (q2 - a2)) / (
        n_pos * n_neg
    )
    # The variance is >= 0 in exact arithmetic; clamp the rounding at A = 0 or 1.
    return np.sqrt(np.maximum(variance, 0.0))


def hanley_mcneil_arrays(
    auc: np.ndarray, n_pos: np.ndarray, n_neg: np.ndarray, z: float
) -> tuple[np.ndarray, np.ndarray]:
    """Wald intervals AUC +- z SE with the Hanley-McNeil SE, clipped to [0, 1], elementwise."""
    half = z * hanley_mcneil_se(auc, n_pos, n_neg)
    return np.maximum(0.0, auc - half), np.minimum(1.0, auc + half)


def hanley_mcneil(auc: float, n_pos: int, n_neg: int, z: float) -> tuple[float, float]:
    """Wald interval AUC +- z SE with the Hanley-McNeil SE, clipped to [0, 1]."""
    half = z * float(hanley_mcneil_se(float(auc), float(n_pos), float(n_neg)))
    return max(0.0, auc - half), min(1.0, auc + half)
