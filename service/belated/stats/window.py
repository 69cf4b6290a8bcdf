"""Sufficient statistics of a window of binary predictions: a value that merges by addition.

Everything a binary measure needs is a count, a float sum or a histogram, so the stats of
two windows (or two hours, or two segments' rows) add up to the stats of their union:
counts exactly, float sums to within rounding of the summation order.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, fields

import numpy as np

from belated.stats.calibration import brier_terms, logloss_terms
from belated.stats.delays import N_DELAY_BINS, delay_histogram
from belated.stats.estimates import expected_confusion
from belated.stats.ranking import N_BINS, score_bins

_COUNTS = ("n_pred", "n_labelled", "n_implied", "n_pred_pos", "tp", "fp", "fn", "tn")
_SUMS = ("brier_sum", "logloss_sum", "exp_tp", "exp_fp", "exp_fn", "exp_tn")
_HISTS = ("hist_all", "hist_pos", "hist_neg")
_SSUMS = ("ssum_all", "ssum_pos", "ssum_neg")


def _hist(bins: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
    counts = np.bincount(bins, weights=weights, minlength=N_BINS)
    return counts.astype(np.float64 if weights is not None else np.int64)


@dataclass(eq=False, slots=True)
class WindowStats:
    """Counts, sums and histograms of one window (see DESIGN.md, "Architecture").

    Confusion counts are over labelled predictions (explicit labels plus implied
    negatives, which count as actual negative); `n_pred_pos`, the expected counts and
    `hist_all` / `ssum_all` are over all predictions. `hist_pos` / `hist_neg` hold the
    labelled predictions by actual class; `ssum_*` the sum of scores in each bin.
    """

    n_pred: int
    n_labelled: int
    n_implied: int
    n_pred_pos: int
    tp: int
    fp: int
    fn: int
    tn: int
    brier_sum: float
    logloss_sum: float
    exp_tp: float
    exp_fp: float
    exp_fn: float
    exp_tn: float
    hist_all: np.ndarray
    ssum_all: np.ndarray
    hist_pos: np.ndarray
    ssum_pos: np.ndarray
    hist_neg: np.ndarray
    ssum_neg: np.ndarray
    delay_hist: np.ndarray

    @classmethod
    def empty(cls) -> WindowStats:
        """The stats of a window with no predictions (the identity of `merge`)."""
        zeros_i = np.zeros(N_BINS, dtype=np.int64)
        zeros_f = np.zeros(N_BINS, dtype=np.float64)
        return cls(
            0, 0, 0, 0, 0, 0, 0, 0,
            0.0, 0.0, 0.0, 0.0, 0.0, 0.0,
            zeros_i, zeros_f, zeros_i.copy(), zeros_f.copy(), zeros_i.copy(), zeros_f.copy(),
            np.zeros(N_DELAY_BINS, dtype=np.int64),
        )  # fmt: skip

    def merge(self, other: WindowStats) -> WindowStats:
        """The stats of both windows' predictions together (a new value; neither changes)."""
        return WindowStats(
            *(getattr(self, f.name) + getattr(other, f.name) for f in fields(WindowStats))
        )

    def __add__(self, other: WindowStats) -> WindowStats:
        """`a + b` is `a.merge(b)`."""
        return self.merge(other)

    @property
    def u_p(self) -> int:
        """Unlabelled predicted positives."""
        return self.n_pred_pos - self.tp - self.fp

    @property
    def u_n(self) -> int:
        """Unlabelled predicted negatives."""
        return (self.n_pred - self.n_pred_pos) - self.fn - self.tn

    def isclose(self, other: WindowStats, *, rel: float = 1e-9) -> bool:
        """Counts and histograms equal, float sums equal to within `rel` (relative)."""
        for name in (*_COUNTS, *_HISTS, "delay_hist"):
            if not np.array_equal(getattr(self, name), getattr(other, name)):
                return False
        for name in (*_SUMS, *_SSUMS):
            if not np.allclose(getattr(self, name), getattr(other, name), rtol=rel, atol=0):
                return False
        return True

    @classmethod
    def from_rows(
        cls,
        scores: Sequence[float] | np.ndarray,
        predicted_pos: Sequence[bool] | np.ndarray,
        actual: Sequence[int | None] | np.ndarray,
        implied: Sequence[bool] | np.ndarray | None = None,
        delays_hours: Sequence[float | None] | np.ndarray | None = None,
    ) -> WindowStats:
        """Build the stats from raw rows (the reference the rollups must agree with).

        `actual` is 1, 0 or None (unlabelled); a row flagged in `implied` is an implied
        negative (its actual must be None or 0). `delays_hours` holds the label delay of
        labelled rows; None or NaN leaves a row out of the delay histogram.
        """
        p = np.asarray(scores, dtype=np.float64)
        n = p.size
        flagged = np.asarray(predicted_pos, dtype=bool)
        raw = np.array([np.nan if a is None else a for a in actual], dtype=np.float64)
        implied_arr = np.zeros(n, dtype=bool) if implied is None else np.asarray(implied, bool)
        if flagged.size != n or raw.size != n or implied_arr.size != n:
            raise ValueError("every row needs a score, a predicted label and an actual")
        if np.any((p < 0) | (p > 1) | np.isnan(p)):
            raise ValueError("scores must lie in [0, 1]")
        if np.any(implied_arr & (raw == 1)):
            raise ValueError("an implied negative cannot have actual 1")
        known = ~np.isnan(raw)
        if np.any(known & (raw != 0) & (raw != 1)):
            raise ValueError("actual must be 0, 1 or None")
        labelled = known | implied_arr
        y = np.where(known, raw, 0.0)
        positive = labelled & (y == 1)
        negative = labelled & (y == 0)
        bins = score_bins(p)
        exp_tp, exp_fp, exp_fn, exp_tn = expected_confusion(p, flagged)
        delays = _delays(delays_hours, n)
        return cls(
            n_pred=n,
            n_labelled=int(labelled.sum()),
            n_implied=int(implied_arr.sum()),
            n_pred_pos=int(flagged.sum()),
            tp=int((positive & flagged).sum()),
            fp=int((negative & flagged).sum()),
            fn=int((positive & ~flagged).sum()),
            tn=int((negative & ~flagged).sum()),
            brier_sum=float(brier_terms(p[labelled], y[labelled]).sum()),
            logloss_sum=float(logloss_terms(p[labelled], y[labelled]).sum()),
            exp_tp=exp_tp,
            exp_fp=exp_fp,
            exp_fn=exp_fn,
            exp_tn=exp_tn,
            hist_all=_hist(bins),
            ssum_all=_hist(bins, p),
            hist_pos=_hist(bins[positive]),
            ssum_pos=_hist(bins[positive], p[positive]),
            hist_neg=_hist(bins[negative]),
            ssum_neg=_hist(bins[negative], p[negative]),
            delay_hist=delay_histogram(delays[~np.isnan(delays)]),
        )


def _delays(delays_hours: Sequence[float | None] | np.ndarray | None, n: int) -> np.ndarray:
    """Delays as float64 with NaN for 'none'."""
    if delays_hours is None:
        return np.full(n, np.nan)
    out = np.array([np.nan if d is None else d for d in delays_hours], dtype=np.float64)
    if out.size != n:
        raise ValueError("delays_hours must have one entry per row")
    return out
