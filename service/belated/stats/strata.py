"""A window's predictions as hourly cohorts x strata, the input of projected measures.

A stratum is a set of predictions that share one predicted side and one pair of arrival
curves (negative, positive): with one curve per class the strata are the two predicted
sides; with curves per score band they are the bands, each split at the threshold. Every
array is per hourly cohort (rows) and stratum (columns), so it sums straight from rollups.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from belated.stats.arrival import CurveFit, cohort_arrival
from belated.stats.estimates import first_positive_bin
from belated.stats.ranking import N_BINS

CLASS_NAMES = ("negative", "positive")


@dataclass(frozen=True)
class Strata:
    """Hourly cohorts x strata of one window.

    `predictions` (H, S): predictions per cohort and stratum, labelled or not.
    `labelled` (H, S, 2): labels arrived so far per cohort, stratum and actual class
    (negative, positive), implied negatives among the negatives.
    `predicted_positive` (S,): whether the stratum's predictions are predicted positive.
    `curves` (S x 2): per stratum the negative and the positive class's fitted curve; strata
    sharing a curve pass the same object (their curve uncertainty then moves together).
    `ages_hours` (H,): hours from the start of each cohort's hour to now.
    """

    predictions: np.ndarray
    labelled: np.ndarray
    predicted_positive: np.ndarray
    curves: tuple[tuple[CurveFit, CurveFit], ...]
    ages_hours: np.ndarray

    def __post_init__(self) -> None:
        h, s = self.predictions.shape
        if self.labelled.shape != (h, s, 2):
            raise ValueError("labelled must be (cohorts, strata, 2)")
        if self.predicted_positive.shape != (s,) or len(self.curves) != s:
            raise ValueError("one predicted side and one pair of curves per stratum")
        if self.ages_hours.shape != (h,):
            raise ValueError("one age per cohort")
        if (self.labelled.sum(axis=2) > self.predictions).any() or (self.labelled < 0).any():
            raise ValueError("more labels than predictions in a cohort")

    def missing_curve(self) -> str | None:
        """The reason of the first missing curve of a stratum with predictions, or None."""
        used = self.predictions.sum(axis=0) > 0
        for s, pair in enumerate(self.curves):
            for name, fit in zip(CLASS_NAMES, pair, strict=True):
                if used[s] and fit.curve is None:
                    return f"no arrival curve for the {name} class: {fit.reason} ({fit.n_labels})"
        return None

    def arrival(self, extra_hours: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
        """F and its variance (H, S, 2) at every cohort's age plus `extra_hours`."""
        shape = (*self.predictions.shape, 2)
        f, v = np.zeros(shape), np.zeros(shape)
        done: dict[int, tuple[np.ndarray, np.ndarray]] = {}  # strata share curves: once each
        for s, pair in enumerate(self.curves):
            for c, fit in enumerate(pair):
                if fit.curve is not None:
                    if id(fit) not in done:
                        done[id(fit)] = cohort_arrival(fit.curve, self.ages_hours + extra_hours)
                    f[:, s, c], v[:, s, c] = done[id(fit)]
        return f, v

    def arrived(self, extra_hours: float = 0.0) -> np.ndarray:
        """F alone (H, S, 2) at every cohort's age plus `extra_hours` (no variance)."""
        f = np.zeros((*self.predictions.shape, 2))
        mid = np.maximum(self.ages_hours + extra_hours - 0.5, 0.0)  # as cohort_arrival
        done: dict[int, np.ndarray] = {}
        for s, pair in enumerate(self.curves):
            for c, fit in enumerate(pair):
                if fit.curve is not None:
                    if id(fit) not in done:
                        done[id(fit)] = fit.curve.at(mid)
                    f[:, s, c] = done[id(fit)]
        return f

    def curve_index(self) -> tuple[np.ndarray, int]:
        """(S, 2) index of each stratum's curves among the distinct ones, and how many."""
        seen: dict[int, int] = {}
        index = np.zeros((len(self.curves), 2), dtype=np.int64)
        for s, pair in enumerate(self.curves):
            for c, fit in enumerate(pair):
                index[s, c] = seen.setdefault(id(fit), len(seen))
        return index, len(seen)


def class_strata(
    *,
    n_pred: np.ndarray,
    n_pred_pos: np.ndarray,
    tp: np.ndarray,
    fp: np.ndarray,
    fn: np.ndarray,
    tn: np.ndarray,
    ages_hours: np.ndarray,
    negative: CurveFit,
    positive: CurveFit,
) -> Strata:
    """Strata of one curve per class: predicted negative (0) and predicted positive (1).

    Every argument but the curves is one value per hourly cohort of the window, as in the
    rollups: predictions, predicted positives, and the labelled confusion counts (implied
    negatives counted in fp and tn).
    """
    n = np.asarray(n_pred, dtype=np.int64)
    pp = np.asarray(n_pred_pos, dtype=np.int64)
    predictions = np.stack([n - pp, pp], axis=1)
    labelled = np.stack([np.stack([tn, fn], axis=1), np.stack([fp, tp], axis=1)], axis=1).astype(
        np.int64
    )
    return Strata(
        predictions,
        labelled,
        np.array([False, True]),
        ((negative, positive), (negative, positive)),
        np.asarray(ages_hours, dtype=np.float64),
    )


def score_bands(n_bands: int = 10) -> list[tuple[int, int]]:
    """Equal bands of the 100 score bins, as (first bin, last bin + 1): tens by default."""
    if not 1 <= n_bands <= N_BINS:
        raise ValueError(f"n_bands must lie in [1, {N_BINS}]")
    edges = np.linspace(0, N_BINS, n_bands + 1).round().astype(int)
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True)]


def merge_bands(
    bands: Sequence[tuple[int, int]], labels: np.ndarray, min_labels: int
) -> list[tuple[int, int]]:
    """Adjacent bands merged until each has at least `min_labels` labels of every class.

    `labels` (bands, classes): the history's labels per band and actual class. Bands are
    merged upwards (a short band joins the next one; a short last band joins the one before),
    so every band can have a curve of each class.
    """
    counts = np.asarray(labels, dtype=np.int64)
    if counts.shape[0] != len(bands):
        raise ValueError("one row of label counts per band")
    merged: list[list[int]] = []  # [first bin, last bin + 1, then the counts per class]
    for (lo, hi), row in zip(bands, counts, strict=True):
        if merged and (np.asarray(merged[-1][2:]) < min_labels).any():
            merged[-1][1] = hi
            merged[-1][2:] = (np.asarray(merged[-1][2:]) + row).tolist()
        else:
            merged.append([lo, hi, *row.tolist()])
    if len(merged) > 1 and (np.asarray(merged[-1][2:]) < min_labels).any():
        last = merged.pop()
        merged[-1][1] = last[1]
    return [(m[0], m[1]) for m in merged]


def band_strata(
    *,
    hist_all: np.ndarray,
    hist_neg: np.ndarray,
    hist_pos: np.ndarray,
    threshold: float,
    ages_hours: np.ndarray,
    bands: Sequence[tuple[int, int]],
    curves: Sequence[tuple[CurveFit, CurveFit]],
) -> Strata:
    """Strata of curves per score band: each band split at the threshold into its sides.

    `hist_all` (H, 100): per cohort the score histogram of all predictions; `hist_neg`,
    `hist_pos` (H, 100): of the labelled negatives and positives. Bins at or above
    `first_positive_bin(threshold)` are predicted positive. `curves[j]` are band j's
    (negative, positive) curves, fitted from that band's delay histograms.
    """
    if len(bands) != len(curves):
        raise ValueError("one pair of curves per band")
    cut = first_positive_bin(threshold)
    all_, neg, pos = (np.asarray(x, dtype=np.int64) for x in (hist_all, hist_neg, hist_pos))
    columns: list[np.ndarray] = []
    labels: list[np.ndarray] = []
    sides: list[bool] = []
    pairs: list[tuple[CurveFit, CurveFit]] = []
    for (lo, hi), pair in zip(bands, curves, strict=True):
        for a, b, side in ((lo, min(hi, cut), False), (max(lo, cut), hi, True)):
            if a >= b:
                continue
            columns.append(all_[:, a:b].sum(axis=1))
            labels.append(np.stack([neg[:, a:b].sum(axis=1), pos[:, a:b].sum(axis=1)], axis=1))
            sides.append(side)
            pairs.append(pair)
    return Strata(
        np.stack(columns, axis=1),
        np.stack(labels, axis=1),
        np.array(sides),
        tuple(pairs),
        np.asarray(ages_hours, dtype=np.float64),
    )
