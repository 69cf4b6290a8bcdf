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
from typing import NamedTuple

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
    "PSI_RESAMPLES",
    "PsiTest",
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
    "psi_test",
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


PSI_RESAMPLES = 1000


class PsiTest(NamedTuple):
    """PSI on the baseline's deciles and its p-value against unchanged data (None: no test)."""

    value: Value
    p_value: float | None


def _decile_groups(hists: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per row: each of the 100 bins' merged-bin number, and which merged bins exist."""
    cumulative = np.cumsum(hists, axis=1)
    total = cumulative[:, -1:]
    deciles = np.arange(1, 10)
    # The first edge at or below which d/10 of the row lies, as `decile_cuts` takes it.
    edges = np.argmax(cumulative[:, None, :] * 10 >= deciles[None, :, None] * total[:, :, None],
                      axis=2) + 1  # fmt: skip
    fresh = np.ones_like(edges, dtype=bool)
    fresh[:, 1:] = edges[:, 1:] > edges[:, :-1]
    valid = fresh & (edges < N_BINS)
    bins = np.arange(N_BINS)
    groups = (valid[:, :, None] & (edges[:, :, None] <= bins[None, None, :])).sum(axis=1)
    exists = np.arange(10)[None, :] <= valid.sum(axis=1)[:, None]
    return groups, exists


def _psi_rows(baseline: np.ndarray, current: np.ndarray) -> np.ndarray:
    """PSI of each row pair, cut at each baseline row's own deciles (vectorised `psi`)."""
    groups, exists = _decile_groups(baseline)
    onehot = groups[:, :, None] == np.arange(10)[None, None, :]
    merged_base = np.einsum("bk,bkg->bg", baseline, onehot)
    merged_cur = np.einsum("bk,bkg->bg", current, onehot)

    def shares(merged: np.ndarray) -> np.ndarray:
        raw = np.where(
            exists, np.maximum(merged / merged.sum(axis=1, keepdims=True), SHARE_FLOOR), 0.0
        )
        out: np.ndarray = raw / raw.sum(axis=1, keepdims=True)
        return out

    e, a = shares(merged_base), shares(merged_cur)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(exists, (a - e) * np.log(a / e), 0.0)
    total: np.ndarray = terms.sum(axis=1)
    return total


def psi_test(
    baseline_hist: np.ndarray,
    current_hist: np.ndarray,
    *,
    min_count: int = MIN_PREDICTIONS,
    resamples: int = PSI_RESAMPLES,
    seed: int = 0,
) -> PsiTest:
    """PSI of the score distribution and its p-value under "nothing changed".

    PSI has a sampling distribution: two samples of 100 predictions from one distribution
    give PSI >= 0.1 about half the time. The p-value is that of a parametric bootstrap
    under the null: both histograms are redrawn as multinomials of their own sizes from the
    pooled 100-bin shares, the deciles are taken again from each redrawn baseline, and
    p = (1 + #{PSI* >= PSI}) / (1 + B). Seeded by `seed` and the histograms, so the same
    windows give the same p-value. The p-value is None when PSI is undefined.
    """
    value = psi(baseline_hist, current_hist, min_count=min_count)
    if value.value is None:
        return PsiTest(value, None)
    base = np.asarray(baseline_hist, dtype=np.int64)
    cur = np.asarray(current_hist, dtype=np.int64)
    pooled = (base + cur).astype(np.float64)
    rng = np.random.default_rng([int(seed), *base.tolist(), *cur.tolist()])
    base_draws = rng.multinomial(int(base.sum()), pooled / pooled.sum(), size=resamples)
    cur_draws = rng.multinomial(int(cur.sum()), pooled / pooled.sum(), size=resamples)
    null = _psi_rows(base_draws.astype(np.float64), cur_draws.astype(np.float64))
    # A tiny allowance so that a draw equal to the observed PSI up to rounding counts.
    exceed = np.count_nonzero(null >= value.value * (1.0 - 1e-12))
    return PsiTest(value, float((1 + exceed) / (1 + resamples)))
