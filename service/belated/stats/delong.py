"""DeLong's variance of ROC AUC from the per-class score histograms, its interval and test.

DeLong, DeLong and Clarke-Pearson (1988, Biometrics 44:837-845): the AUC is the mean of the
positives' placement values V10 (the share of negatives ranked below a positive, ties one
half) and equally the mean of the negatives' V01 (the share of positives ranked above a
negative). Its variance is estimated by S10 / m + S01 / n, with S10 and S01 the sample
variances of the placement values over the m positives and n negatives. On a histogram the
scores in one bin are tied, so every positive in bin k has the same placement value (the
midrank rule): V10(k) = (negatives below k + negatives in k / 2) / n, and likewise V01.
The sums run over the 100 bins weighted by the counts, so the cost does not grow with the
window. Both variances need two members of the class; with one the variance is NaN.

The interval is built on the logit scale, logit(A) +- z SE / (A (1 - A)), and mapped back,
so it stays inside (0, 1) and is lopsided near 1 as the AUC's sampling distribution is
(a transform compared by Qin and Hotilovac 2008, Statistical Methods in Medical Research
17:207-221). By simulation (binormal scores binned to 100 bins; 2,000 windows per cell)
its 95% coverage is 0.89-0.95 at 20-300 positives and AUC 0.76-0.98, where the plain Wald
interval gives 0.80-0.95 and Hanley-McNeil's over-covers at 0.96-0.998. At A = 0 or 1 the
logit is infinite and the plain Wald interval is used.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from belated.stats.change import normal_cdf


def delong_arrays(hist_pos: Any, hist_neg: Any) -> dict[str, np.ndarray]:
    """AUC and DeLong variance of many windows (rows of 100-bin histograms).

    Keys: roc_auc, variance, n_pos, n_neg. AUC is NaN without positives or negatives; the
    variance is NaN unless each class has at least two members.
    """
    pos = np.asarray(hist_pos, dtype=np.float64)
    neg = np.asarray(hist_neg, dtype=np.float64)
    cum_pos = np.cumsum(pos, axis=-1)
    cum_neg = np.cumsum(neg, axis=-1)
    n_pos = cum_pos[..., -1]
    n_neg = cum_neg[..., -1]
    with np.errstate(divide="ignore", invalid="ignore"):
        v10 = (cum_neg - 0.5 * neg) / n_neg[..., None]
        v01 = (n_pos[..., None] - cum_pos + 0.5 * pos) / n_pos[..., None]
        auc = (pos * v10).sum(axis=-1) / n_pos
        s10 = (pos * (v10 - auc[..., None]) ** 2).sum(axis=-1) / (n_pos - 1.0)
        s01 = (neg * (v01 - auc[..., None]) ** 2).sum(axis=-1) / (n_neg - 1.0)
        variance = s10 / n_pos + s01 / n_neg
    defined = (n_pos > 0) & (n_neg > 0)
    return {
        "roc_auc": np.where(defined, auc, np.nan),
        "variance": np.where((n_pos > 1) & (n_neg > 1), variance, np.nan),
        "n_pos": n_pos,
        "n_neg": n_neg,
    }


def delong_interval_arrays(
    auc: np.ndarray, variance: np.ndarray, z: float
) -> tuple[np.ndarray, np.ndarray]:
    """Logit-scale DeLong intervals, elementwise; NaN where the AUC or variance is NaN.

    At A = 0 or 1 (where the logit is infinite) the plain Wald interval A +- z SE, clipped
    to [0, 1].
    """
    a = np.asarray(auc, dtype=np.float64)
    se = np.sqrt(np.maximum(variance, 0.0))
    inside = (a > 0.0) & (a < 1.0)
    safe = np.where(inside, a, 0.5)
    centre = np.log(safe / (1.0 - safe))
    spread = z * se / (safe * (1.0 - safe))
    low = 1.0 / (1.0 + np.exp(-(centre - spread)))
    high = 1.0 / (1.0 + np.exp(-(centre + spread)))
    wald_low = np.maximum(0.0, a - z * se)
    wald_high = np.minimum(1.0, a + z * se)
    nan = np.isnan(a) | np.isnan(variance)
    low = np.where(nan, np.nan, np.where(inside, low, wald_low))
    high = np.where(nan, np.nan, np.where(inside, high, wald_high))
    return low, high


def delong_interval(hist_pos: Any, hist_neg: Any, z: float) -> tuple[float, float] | None:
    """Logit-scale DeLong interval of one window's AUC; None without a variance."""
    arrays = delong_arrays(np.asarray(hist_pos)[None, :], np.asarray(hist_neg)[None, :])
    low, high = delong_interval_arrays(arrays["roc_auc"], arrays["variance"], z)
    if math.isnan(float(low[0])) or math.isnan(float(high[0])):
        return None
    return float(low[0]), float(high[0])


def auc_drop_p_value(
    current_pos: Any,
    current_neg: Any,
    baseline_pos: Any,
    baseline_neg: Any,
    tolerance: float = 0.0,
) -> float | None:
    """One-sided p-value of H0: AUC(current) - AUC(baseline) >= -tolerance, or None.

    The two windows hold different predictions, so their estimates are independent. The
    test compares logit(A1) with logit(A2 - tolerance), each with its DeLong variance
    carried by the delta method: Phi((logit A1 - logit t) / sqrt(V1 / (A1 (1 - A1))^2 +
    V2 / (t (1 - t))^2)), t = A2 - tolerance. On the logit scale the false-alarm rate at
    20-200 positives stays near alpha where the plain difference runs at 0.015-0.05 for
    AUCs near 0.9. Where a logit is infinite the plain difference over sqrt(V1 + V2) is
    used. None (no test) when either AUC or either variance is undefined.
    """
    arrays = delong_arrays(
        np.stack([np.asarray(current_pos), np.asarray(baseline_pos)]),
        np.stack([np.asarray(current_neg), np.asarray(baseline_neg)]),
    )
    a1, a2 = arrays["roc_auc"].tolist()
    v1, v2 = arrays["variance"].tolist()
    if any(math.isnan(v) for v in (a1, a2, v1, v2)):
        return None
    target = a2 - tolerance
    if a1 >= 1.0 or target <= 0.0:
        # Nothing lies above an AUC of 1, and every AUC is above a target at or below 0.
        return 1.0
    if 0.0 < a1 and target < 1.0:
        logit_gap = math.log(a1 / (1.0 - a1)) - math.log(target / (1.0 - target))
        spread = v1 / (a1 * (1.0 - a1)) ** 2 + v2 / (target * (1.0 - target)) ** 2
        if spread > 0.0:
            return normal_cdf(logit_gap / math.sqrt(spread))
    excess = a1 - target
    se = math.sqrt(v1 + v2)
    if se == 0.0:
        return 1.0 if excess >= 0.0 else 0.0
    return normal_cdf(excess / se)
