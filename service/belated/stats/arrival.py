"""Arrival curves: the share of one actual class's eventual labels that has arrived by an age.

For an actual class c, F_c(t) is the share of that class's labels (the ones that will ever
arrive) whose delay is at most t hours. It cannot be estimated with the usual Kaplan-Meier
censoring: an unlabelled prediction's class is unknown, so it cannot be censored in the
curve of its class. What is known is per hourly cohort of predictions: the labels of class c
that have arrived, with their delays, and the cohort's age a. Every label of class c with a
delay up to a is seen; those with longer delays are not, and how many there are is unknown.
The delays of a class are *right-truncated* at the cohort's age.

Right-truncated delays are estimated in reverse time (Lagakos, Barraj and De Gruttola 1988,
"Nonparametric analysis of truncated survival data, with application to AIDS", Biometrika
75(3):515-523; Kalbfleisch and Lawless 1991, "Regression models for right truncated data
with applications to AIDS incubation times and reporting lags", Statistica Sinica 1:19-32).
The reverse hazard of bin b is g_b = d_b / R_b: d_b labels fell in bin b, and R_b labels fell
in bin b or earlier, both counted over the cohorts that have seen the whole of bin b (the
upper edge of b at most the age of the cohort's youngest prediction). Then

    F(upper edge of b - 1) = F(upper edge of b) * (1 - g_b),  F = 1 above the last label,

a product-limit estimator run from the longest delay down. Cohorts old enough to have seen
every delay (the complete ones) are in every risk set, and with complete cohorts only the
estimate is the plain share of delays up to t, which is Kaplan-Meier without censoring. The
estimator assumes the delay distribution does not drift over the history used. Delays past
the longest one any cohort has seen are taken not to exist: F is relative to what the
history can show.

Variance: the Greenwood form in reverse time, Var log F(t) = sum over bins above t of
d_b / (R_b (R_b - d_b)) (Kalbfleisch and Lawless 1991); with complete cohorts it is exactly
the binomial F (1 - F) / n.

Implied negatives (no label `negative_after_days` after the prediction) arrive at that age
by definition: they are passed apart and counted as labels of the negative class with a delay
of exactly that age, so the negative curve jumps there.

Between bin edges F is interpolated linearly (labels spread evenly over a bin), except that
the implied negatives' share arrives at once at their age.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from belated.stats.delays import DELAY_EDGES_HOURS, N_DELAY_BINS, delay_bin

MIN_LABELS = 200
_UPPER = np.asarray(DELAY_EDGES_HOURS[1:], dtype=np.float64)


@dataclass(frozen=True)
class ArrivalCurve:
    """One class's arrival curve: F and its variance at a list of ages (knots), linear between.

    `knots_hours` is non-decreasing; a repeated knot is a jump (implied negatives). F is 0
    before the first knot and its last value after the last one.
    """

    knots_hours: np.ndarray
    arrived: np.ndarray
    variance: np.ndarray
    n_labels: int

    def at(self, ages_hours: np.ndarray | float) -> np.ndarray:
        """F at each age in hours (0 at ages up to 0)."""
        return _interp(ages_hours, self.knots_hours, self.arrived)

    def variance_at(self, ages_hours: np.ndarray | float) -> np.ndarray:
        """The variance of F at each age in hours."""
        return _interp(ages_hours, self.knots_hours, self.variance)

    def points(self) -> list[dict[str, float]]:
        """[{"age_hours": a, "arrived": F}, ...] at the bin edges where F changes, JSON-ready."""
        keep = np.r_[True, np.diff(self.arrived) != 0] | np.r_[np.diff(self.arrived) != 0, True]
        return [
            {"age_hours": float(a), "arrived": float(f)}
            for a, f in zip(self.knots_hours[keep], self.arrived[keep], strict=True)
        ]


@dataclass(frozen=True)
class CurveFit:
    """A fitted curve, or None with the number of labels it had and the reason."""

    curve: ArrivalCurve | None
    n_labels: int
    reason: str | None = None


def fit_arrival(
    delay_hists: np.ndarray,
    ages_hours: np.ndarray,
    *,
    implied: np.ndarray | None = None,
    implied_after_hours: float | None = None,
    min_labels: int = MIN_LABELS,
) -> CurveFit:
    """The arrival curve of one class (or one class in one score band) from hourly cohorts.

    `delay_hists` (cohorts x N_DELAY_BINS): per cohort, the labels of this class that have
    arrived, by delay bin. `ages_hours` (cohorts): hours from the start of each cohort's hour
    to now, so its predictions are between age - 1 and age hours old. For the negative class
    of a model with `negative_after_days`, `implied` (cohorts) counts each cohort's implied
    negatives and `implied_after_hours` is 24 x negative_after_days. A curve needs at least
    `min_labels` labels in the cohorts used; otherwise the curve is None with the reason.
    """
    hists = np.asarray(delay_hists, dtype=np.float64)
    if hists.ndim != 2 or hists.shape[1] != N_DELAY_BINS:
        raise ValueError(f"delay_hists must be (cohorts, {N_DELAY_BINS})")
    ages = np.asarray(ages_hours, dtype=np.float64).reshape(-1)
    if ages.shape[0] != hists.shape[0]:
        raise ValueError("one age per cohort")
    jump_bin = None
    implied_counts = np.zeros(ages.shape[0])
    if implied is not None:
        if implied_after_hours is None or not implied_after_hours > 0:
            raise ValueError("implied negatives need implied_after_hours > 0")
        jump_bin = delay_bin(implied_after_hours)
        hists = hists.copy()
        implied_counts = np.asarray(implied, dtype=np.float64).reshape(-1)
        hists[:, jump_bin] += implied_counts
    # cohort h has seen all of bin b once its youngest prediction (age - 1) is past b's edge
    seen = _UPPER[None, :] <= (ages[:, None] - 1.0)
    events = np.where(seen, hists, 0.0)
    d = events.sum(axis=0)
    r = np.where(seen, np.cumsum(hists, axis=1), 0.0).sum(axis=0)
    n_labels = int(round(float(d.sum())))
    if n_labels < min_labels:
        return CurveFit(None, n_labels, f"fewer than {min_labels} labels in the history used")
    with np.errstate(divide="ignore", invalid="ignore"):
        g = np.where(r > 0, d / r, 0.0)
        green = np.where((r > d) & (d > 0), d / (r * (r - d)), 0.0)
    # F at the upper edge of bin b is the product of (1 - g) over the bins above b
    factors = 1.0 - g
    above = np.r_[np.cumprod(factors[::-1])[::-1][1:], 1.0]
    arrived = above.copy()
    log_var = np.r_[np.cumsum(green[::-1])[::-1][1:], 0.0]
    variance = np.where(arrived > 0, arrived**2 * log_var, 0.0)
    # F at the lower edge of each bin: F at the upper edge times (1 - g)
    lower = arrived * factors
    lower_var = np.where(lower > 0, lower**2 * (log_var + green), 0.0)
    implied_seen = float(implied_counts[seen[:, jump_bin]].sum()) if jump_bin is not None else 0.0
    curve = _knots(
        lower, arrived, lower_var, variance, d, jump_bin, implied_after_hours, implied_seen
    )
    return CurveFit(ArrivalCurve(curve[0], curve[1], curve[2], n_labels), n_labels)


def _knots(
    lower: np.ndarray,
    arrived: np.ndarray,
    lower_var: np.ndarray,
    variance: np.ndarray,
    d: np.ndarray,
    jump_bin: int | None,
    jump_hours: float | None,
    implied_seen: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Knots at every finite bin edge, plus the implied negatives' jump inside its bin."""
    finite = N_DELAY_BINS - 1  # the last bin is open-ended: no knot at infinity
    x = [0.0, *DELAY_EDGES_HOURS[1 : finite + 1]]
    f = [float(lower[0]), *arrived[:finite].tolist()]
    v = [float(lower_var[0]), *variance[:finite].tolist()]
    if jump_bin is not None and jump_hours is not None and d[jump_bin] > 0:
        # the implied share of the bin's step arrives at once at jump_hours, the rest spread
        lo, hi = DELAY_EDGES_HOURS[jump_bin], DELAY_EDGES_HOURS[jump_bin + 1]
        f_lo, f_hi = float(lower[jump_bin]), float(arrived[jump_bin])
        step = f_hi - f_lo
        explicit = step * max(0.0, 1.0 - _implied_fraction(implied_seen, float(d[jump_bin])))
        before = f_lo + explicit * (jump_hours - lo) / (hi - lo)
        after = before + (step - explicit)
        i = jump_bin + 1  # x[i] is the bin's upper edge; insert the jump before it
        v_mid = float(variance[jump_bin])
        x[i:i] = [jump_hours, jump_hours]
        f[i:i] = [before, after]
        v[i:i] = [float(lower_var[jump_bin]), v_mid]
    return (
        np.asarray(x, dtype=np.float64),
        np.clip(np.asarray(f, dtype=np.float64), 0.0, 1.0),
        np.asarray(v, dtype=np.float64),
    )


def _implied_fraction(implied: float, labels: float) -> float:
    """The implied share of a bin's labels (all implied when the bin's labels are implied)."""
    return min(1.0, implied / labels) if labels > 0 else 0.0


def _interp(ages_hours: np.ndarray | float, knots: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Piecewise-linear interpolation that keeps a jump at a repeated knot: right-continuous."""
    a = np.asarray(ages_hours, dtype=np.float64)
    # right-continuous at a repeated knot: take the segment that starts there
    i = np.clip(np.searchsorted(knots, a, side="right") - 1, 0, knots.size - 2)
    x0, x1 = knots[i], knots[i + 1]
    y0, y1 = values[i], values[i + 1]
    width = np.where(x1 > x0, x1 - x0, 1.0)
    t = np.clip((a - x0) / width, 0.0, 1.0)
    out = np.where(a <= 0.0, 0.0, y0 + t * (y1 - y0))
    return np.where(a >= knots[-1], values[-1], out)


def cohort_arrival(curve: ArrivalCurve, ages_hours: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """F and its variance for hourly cohorts of the given ages (predictions age - 1 to age).

    F is taken at the middle of the hour, age - 0.5, which is the cohort's mean of F where F
    is linear over the hour.
    """
    mid = np.maximum(np.asarray(ages_hours, dtype=np.float64) - 0.5, 0.0)
    return curve.at(mid), curve.variance_at(mid)


def age_reaching(curve: ArrivalCurve, share: float) -> float | None:
    """The first age in hours where F reaches `share`; None when it never does."""
    if not 0.0 <= share <= 1.0 or not math.isfinite(share):
        raise ValueError("share must lie in [0, 1]")
    hit = np.flatnonzero(curve.arrived >= share - 1e-12)
    if not hit.size:
        return None
    j = int(hit[0])
    if j == 0:
        return float(curve.knots_hours[0])
    x0, x1 = curve.knots_hours[j - 1], curve.knots_hours[j]
    y0, y1 = curve.arrived[j - 1], curve.arrived[j]
    if y1 <= y0 or x1 <= x0:
        return float(x1)
    return float(x0 + (share - y0) / (y1 - y0) * (x1 - x0))
