"""Drift of the score and tag distributions against a baseline.

Score drift compares 10 bins placed at the baseline's deciles. The cut points are chosen
among the 100 histogram bin edges: for d = 1..9 the cut is the first edge at or below
which at least d/10 of the baseline lies (ties collapse, so a lumpy baseline can give fewer
than 10 bins). Each side's shares are floored at 1e-4 and renormalised, so an empty bin
cannot make the logarithms infinite. Both sides need at least 100 predictions.

PSI = sum (a - e) ln(a / e), which is the symmetric Kullback-Leibler divergence
KL(a || e) + KL(e || a); the Jensen-Shannon distance is the square root of the JS
divergence with natural logarithms. Read PSI as the trade does: under 0.1 no real shift,
0.1 to 0.25 a moderate one, over 0.25 a major one (`psi_band`).

The tests of change (two-proportion score test, Newcombe's interval, Benjamini-Hochberg)
live in `belated.stats.change` and are re-exported here.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from belated.stats.change import (
    ScoreTest,
    benjamini_hochberg,
    newcombe_diff_interval,
    two_proportion_test,
)
from belated.stats.ranking import N_BINS
from belated.stats.values import Value

__all__ = [
    "MIN_PREDICTIONS",
    "SHARE_FLOOR",
    "ScoreTest",
    "benjamini_hochberg",
    "categorical_psi",
    "decile_cuts",
    "js_distance",
    "merge_at",
    "newcombe_diff_interval",
    "psi",
    "psi_band",
    "two_proportion_test",
]

SHARE_FLOOR = 1e-4
MIN_PREDICTIONS = 100
PSI_MODERATE = 0.1
PSI_MAJOR = 0.25


def decile_cuts(baseline_hist: np.ndarray) -> list[int]:
    """Bin-edge indices (1..99) of the baseline's deciles; fewer when deciles coincide."""
    counts = np.asarray(baseline_hist, dtype=np.int64)
    total = int(counts.sum())
    cumulative = np.cumsum(counts)
    cuts: list[int] = []
    for d in range(1, 10):
        # Integer comparison: cumulative / total >= d / 10 without rounding.
        edge = int(np.argmax(cumulative * 10 >= d * total)) + 1
        if edge < N_BINS and (not cuts or edge > cuts[-1]):
            cuts.append(edge)
    return cuts


def merge_at(hist: np.ndarray, cuts: list[int]) -> np.ndarray:
    """The histogram merged into the bins between consecutive cut edges, as float64."""
    return np.add.reduceat(np.asarray(hist, dtype=np.float64), [0, *cuts])


def _shares(counts: np.ndarray) -> np.ndarray:
    """Counts as shares, each floored at 1e-4, renormalised to sum to 1."""
    shares = np.maximum(counts / counts.sum(), SHARE_FLOOR)
    out: np.ndarray = shares / shares.sum()
    return out


def _too_few(baseline_total: float, current_total: float, min_count: int) -> Value | None:
    if baseline_total < min_count:
        return Value.undefined(f"fewer than {min_count} predictions in the baseline")
    if current_total < min_count:
        return Value.undefined(f"fewer than {min_count} predictions in the window")
    return None


def _psi_of(expected: np.ndarray, actual: np.ndarray) -> float:
    return float(np.sum((actual - expected) * np.log(actual / expected)))


def _js_of(expected: np.ndarray, actual: np.ndarray) -> float:
    middle = 0.5 * (expected + actual)
    divergence = 0.5 * np.sum(expected * np.log(expected / middle)) + 0.5 * np.sum(
        actual * np.log(actual / middle)
    )
    # Rounding can leave -1e-17 for identical inputs; the distance is then 0.
    return float(np.sqrt(max(divergence, 0.0)))


def _decile_shares(
    baseline_hist: np.ndarray, current_hist: np.ndarray, min_count: int
) -> tuple[np.ndarray, np.ndarray] | Value:
    baseline = np.asarray(baseline_hist, dtype=np.int64)
    current = np.asarray(current_hist, dtype=np.int64)
    if baseline.shape != (N_BINS,) or current.shape != (N_BINS,):
        raise ValueError(f"score histograms must have {N_BINS} bins")
    too_few = _too_few(float(baseline.sum()), float(current.sum()), min_count)
    if too_few is not None:
        return too_few
    cuts = decile_cuts(baseline)
    return _shares(merge_at(baseline, cuts)), _shares(merge_at(current, cuts))


def psi(
    baseline_hist: np.ndarray, current_hist: np.ndarray, *, min_count: int = MIN_PREDICTIONS
) -> Value:
    """Population stability index of the score distribution on the baseline's deciles."""
    shares = _decile_shares(baseline_hist, current_hist, min_count)
    if isinstance(shares, Value):
        return shares
    return Value(_psi_of(*shares))


def js_distance(
    baseline_hist: np.ndarray, current_hist: np.ndarray, *, min_count: int = MIN_PREDICTIONS
) -> Value:
    """Jensen-Shannon distance (natural log) of the score distribution on the deciles."""
    shares = _decile_shares(baseline_hist, current_hist, min_count)
    if isinstance(shares, Value):
        return shares
    return Value(_js_of(*shares))


def categorical_psi(
    baseline_counts: Mapping[str, int],
    current_counts: Mapping[str, int],
    *,
    min_count: int = MIN_PREDICTIONS,
) -> Value:
    """PSI between two categorical distributions (e.g. a tag's values), union of categories."""
    categories = sorted(set(baseline_counts) | set(current_counts))
    baseline = np.array([baseline_counts.get(c, 0) for c in categories], dtype=np.float64)
    current = np.array([current_counts.get(c, 0) for c in categories], dtype=np.float64)
    too_few = _too_few(float(baseline.sum()), float(current.sum()), min_count)
    if too_few is not None:
        return too_few
    return Value(_psi_of(_shares(baseline), _shares(current)))


def psi_band(value: float) -> str:
    """'stable' under 0.1, 'moderate' from 0.1 to 0.25, 'major' above (common practice)."""
    if value < PSI_MODERATE:
        return "stable"
    if value <= PSI_MAJOR:
        return "moderate"
    return "major"
