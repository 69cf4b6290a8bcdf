"""Tests of change between two windows, and the correction for testing many segments.

- Two-proportion score test (pooled variance) for a change of rate, with one- and two-sided
  p-values.
- Newcombe's hybrid score interval for a difference of two proportions (Newcombe 1998,
  Statistics in Medicine 17:873-890, method 10): Wilson limits of each proportion combined
  as a square-root-of-sums, which keeps the interval inside [-1, 1] and well behaved at 0.
- Benjamini-Hochberg (1995, JRSS B 57:289-300) step-up adjustment of a family of p-values.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import NamedTuple

from belated.stats.intervals import wilson, z_value


class ScoreTest(NamedTuple):
    """z statistic and p-values for H0: p1 = p2 (less: p1 < p2, greater: p1 > p2)."""

    z: float
    p_two_sided: float
    p_less: float
    p_greater: float


def normal_cdf(z: float) -> float:
    """The standard normal distribution function, via erfc for accuracy in the tails."""
    return 0.5 * math.erfc(-z / math.sqrt(2.0))


def two_proportion_test(x1: int, n1: int, x2: int, n2: int) -> ScoreTest:
    """Score test of x1/n1 against x2/n2 with the pooled proportion; ValueError if n is 0.

    When both samples are all successes or all failures the rates cannot differ: z = 0 and
    every p-value is 1 (what the exact conditional test gives).
    """
    if n1 <= 0 or n2 <= 0:
        raise ValueError("both samples need at least one trial")
    if not (0 <= x1 <= n1 and 0 <= x2 <= n2):
        raise ValueError("successes must lie between 0 and the number of trials")
    pooled = (x1 + x2) / (n1 + n2)
    variance = pooled * (1.0 - pooled) * (1.0 / n1 + 1.0 / n2)
    if variance == 0.0:
        return ScoreTest(0.0, 1.0, 1.0, 1.0)
    z = (x1 / n1 - x2 / n2) / math.sqrt(variance)
    return ScoreTest(z, math.erfc(abs(z) / math.sqrt(2.0)), normal_cdf(z), normal_cdf(-z))


def newcombe_diff_interval(
    x1: int, n1: int, x2: int, n2: int, confidence: float = 0.95
) -> tuple[float, float]:
    """Newcombe's hybrid score interval for p1 - p2; ValueError if either n is 0."""
    if n1 <= 0 or n2 <= 0:
        raise ValueError("both samples need at least one trial")
    if not (0 <= x1 <= n1 and 0 <= x2 <= n2):
        raise ValueError("successes must lie between 0 and the number of trials")
    z = z_value(confidence)
    p1, p2 = x1 / n1, x2 / n2
    l1, u1 = wilson(x1, n1, z)
    l2, u2 = wilson(x2, n2, z)
    difference = p1 - p2
    low = difference - math.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2)
    high = difference + math.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)
    return max(-1.0, low), min(1.0, high)


def benjamini_hochberg(pvalues: Sequence[float], q: float = 0.05) -> tuple[list[float], list[bool]]:
    """BH-adjusted p-values and reject flags at false discovery rate q, in input order."""
    if not 0.0 < q < 1.0:
        raise ValueError(f"q must lie in the open interval (0, 1), got {q}")
    m = len(pvalues)
    for p in pvalues:
        if not 0.0 <= p <= 1.0:
            raise ValueError(f"p-values must lie in [0, 1], got {p}")
    order = sorted(range(m), key=lambda i: pvalues[i])
    adjusted = [0.0] * m
    running = 1.0
    # Step up from the largest p-value: each adjusted value is the smallest m p_(j) / j
    # over j at or above its rank, which keeps the adjusted values monotone.
    for rank in range(m, 0, -1):
        i = order[rank - 1]
        running = min(running, m * float(pvalues[i]) / rank)
        adjusted[i] = running
    return adjusted, [a <= q for a in adjusted]
