"""One-sided p-values of H0: current - baseline >= -tolerance, for drop rules.

Proportions invert Newcombe's hybrid score interval for a difference (Newcombe 1998, method
10); F-beta, MCC and balanced accuracy take a seeded multinomial bootstrap of both windows.
"""

from __future__ import annotations

import numpy as np

from belated.stats.bootstrap import binary_arrays
from belated.stats.change import newcombe_diff_interval
from belated.stats.window import WindowStats

DROP_RESAMPLES = 2000


def drop_proportion(x1: int, n1: int, x2: int, n2: int, tolerance: float) -> float:
    """One-sided p-value of H0: p1 - p2 >= -tolerance by inverting Newcombe's interval."""

    def upper(alpha: float) -> float:
        return newcombe_diff_interval(x1, n1, x2, n2, confidence=1 - 2 * alpha)[1]

    if upper(0.5 - 1e-9) >= -tolerance:
        return 1.0
    lo, hi = 1e-12, 0.5 - 1e-9  # upper(alpha) falls as alpha grows; find where it crosses
    if upper(lo) < -tolerance:
        return lo
    for _ in range(60):
        mid = (lo + hi) / 2
        if upper(mid) < -tolerance:
            hi = mid
        else:
            lo = mid
    return hi


def drop_bootstrap(
    measure: str, cur: WindowStats, base: WindowStats, beta: float, tolerance: float, seed: int
) -> float | None:
    """One-sided bootstrap p-value of H0: current - baseline >= -tolerance."""

    def draws(s: WindowStats, rng: np.random.Generator) -> np.ndarray:
        counts = np.array([s.tp, s.fp, s.fn, s.tn], dtype=np.float64)
        n = int(counts.sum())
        m = rng.multinomial(n, counts / n, size=DROP_RESAMPLES).T.astype(np.float64)
        return binary_arrays(m[0], m[1], m[2], m[3], beta)[measure]

    if measure not in ("fbeta", "mcc", "balanced_accuracy"):
        return None
    if cur.tp + cur.fp + cur.fn + cur.tn == 0 or base.tp + base.fp + base.fn + base.tn == 0:
        return None
    rng = np.random.default_rng(seed)
    diff = draws(cur, rng) - draws(base, rng)
    diff = diff[~np.isnan(diff)]
    if diff.size == 0:
        return None
    return float((np.count_nonzero(diff >= -tolerance) + 1) / (diff.size + 1))
