"""Label delays: the delay histogram and Kaplan-Meier quantiles with censoring.

A label's delay is the hours from its prediction's `ts` to the label's `ts`. Delays are
kept in a histogram over `DELAY_EDGES_HOURS`: hourly bins for 0-48 h, 6-hour bins to 168 h,
24-hour bins to 400 days (9,600 h), and a last open-ended bin, 462 bins in all. The store
computes the same bin index in SQL as

    CASE WHEN h < 48  THEN floor(h)
         WHEN h < 168 THEN 48 + floor((h - 48) / 6)
         ELSE least(68 + floor((h - 168) / 24), 461) END

with negative delays (a label stamped before its prediction, clock skew) taken as 0.

Quantiles come from the Kaplan-Meier product-limit estimator (Kaplan and Meier 1958):
predictions still unlabelled are censored at their current age, so that recent windows,
whose slow labels have not come yet, do not pull the quantiles down. On binned data the
estimator takes a bin's labels and censorings as spread evenly over the bin: a prediction
censored inside a bin is at risk for half of that bin's labels, the life-table (actuarial)
convention (Cutler and Ederer 1958); counting it at risk for all of them, as an earlier
version did, leans the quantiles late where censoring is heavy.

A quantile is interpolated within its bin: in the first bin b where the estimated labelled
share F = 1 - S reaches p, the labels are taken as spread evenly over the bin, so the
quantile is lo_b + (p - F(lo_b)) / (F(hi_b) - F(lo_b)) * (hi_b - lo_b), with F(lo_b) the share
at the bin's lower edge. (Reporting the upper edge instead, as an earlier version did, is up
to one bin late.) A quantile in the last, open-ended bin, or not reached, is None.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

HOURLY_UNTIL = 48
SIX_HOURLY_UNTIL = 168
DAILY_UNTIL = 400 * 24

DELAY_EDGES_HOURS: tuple[float, ...] = (
    tuple(float(h) for h in range(0, HOURLY_UNTIL + 1))
    + tuple(float(h) for h in range(HOURLY_UNTIL + 6, SIX_HOURLY_UNTIL + 1, 6))
    + tuple(float(h) for h in range(SIX_HOURLY_UNTIL + 24, DAILY_UNTIL + 1, 24))
    + (math.inf,)
)
N_DELAY_BINS = len(DELAY_EDGES_HOURS) - 1
LAST_DELAY_BIN = N_DELAY_BINS - 1

_SIX_HOURLY_START = HOURLY_UNTIL
_DAILY_START = HOURLY_UNTIL + (SIX_HOURLY_UNTIL - HOURLY_UNTIL) // 6


def delay_bin(hours: float) -> int:
    """The delay histogram bin of a delay in hours (negative delays count as 0)."""
    if math.isnan(hours):
        raise ValueError("a delay must be a number of hours, got NaN")
    if hours < HOURLY_UNTIL:
        return max(0, math.floor(hours))
    if hours < SIX_HOURLY_UNTIL:
        return _SIX_HOURLY_START + math.floor((hours - HOURLY_UNTIL) / 6)
    if hours >= DAILY_UNTIL:
        return LAST_DELAY_BIN
    return min(_DAILY_START + math.floor((hours - SIX_HOURLY_UNTIL) / 24), LAST_DELAY_BIN)


def delay_bins(hours: np.ndarray) -> np.ndarray:
    """`delay_bin` for an array of delays in hours, as int64."""
    h = np.maximum(np.asarray(hours, dtype=np.float64), 0.0)
    if np.isnan(h).any():
        raise ValueError("delays must be numbers of hours, got NaN")
    capped = np.minimum(h, DAILY_UNTIL)
    bins = np.where(
        capped < HOURLY_UNTIL,
        np.floor(capped),
        np.where(
            capped < SIX_HOURLY_UNTIL,
            _SIX_HOURLY_START + np.floor((capped - HOURLY_UNTIL) / 6),
            _DAILY_START + np.floor((capped - SIX_HOURLY_UNTIL) / 24),
        ),
    )
    return np.minimum(bins.astype(np.int64), LAST_DELAY_BIN)


def delay_histogram(hours: np.ndarray) -> np.ndarray:
    """The delay histogram (int64, `N_DELAY_BINS` long) of an array of delays in hours."""
    return np.bincount(delay_bins(hours), minlength=N_DELAY_BINS).astype(np.int64)


def km_survival(
    event_hist: np.ndarray, censored_hist: np.ndarray, *, censored_halfway: bool = False
) -> np.ndarray:
    """Kaplan-Meier share still unlabelled after each delay bin (1.0 where nobody is at risk).

    `event_hist[b]` labels arrived in bin b; `censored_hist[b]` predictions are unlabelled
    with an age in bin b. Entry b of the result is S at the upper edge of bin b. With
    `censored_halfway`, a prediction censored inside bin b is at risk for half of that bin's
    labels (the life-table convention); otherwise for all of them.
    """
    events = np.asarray(event_hist, dtype=np.float64)
    censored = np.asarray(censored_hist, dtype=np.float64)
    # At risk for bin b: everyone whose label or censoring falls in bin b or later.
    at_risk = np.cumsum((events + censored)[::-1])[::-1]
    if censored_halfway:
        at_risk = at_risk - 0.5 * censored
    with np.errstate(divide="ignore", invalid="ignore"):
        hazard = np.where(at_risk > 0, events / at_risk, 0.0)
    return np.cumprod(1.0 - hazard)


def km_quantiles(
    delay_hist: np.ndarray,
    censored_ages_hours: np.ndarray | Sequence[float],
    probs: Sequence[float] = (0.5, 0.9, 0.99),
    *,
    upper_edge: bool = False,
) -> dict[str, float | None]:
    """Delay quantiles in hours by Kaplan-Meier, e.g. {"p50": 6.0, "p90": 54.0, "p99": None}.

    Each quantile is interpolated within the first bin where the estimated labelled share
    1 - S reaches it; None when it is not reached by 400 days or there is no label at all.
    `upper_edge=True` gives the earlier convention (censored predictions at risk for the
    whole of their bin, the quantile at the bin's upper edge), up to one bin late.
    """
    events = np.asarray(delay_hist, dtype=np.int64)
    if events.shape != (N_DELAY_BINS,):
        raise ValueError(f"delay_hist must have {N_DELAY_BINS} bins")
    ages = np.asarray(censored_ages_hours, dtype=np.float64)
    censored = np.bincount(delay_bins(ages.ravel()), minlength=N_DELAY_BINS)
    labelled_share = 1.0 - km_survival(events, censored, censored_halfway=not upper_edge)
    out: dict[str, float | None] = {}
    for p in probs:
        if not 0.0 < p < 1.0:
            raise ValueError(f"quantile probabilities must lie in (0, 1), got {p}")
        if upper_edge:
            out[_quantile_name(p)] = _upper_edge_quantile(labelled_share, p)
        else:
            out[_quantile_name(p)] = interpolated_quantile(labelled_share, p)
    return out


def _upper_edge_quantile(arrived: np.ndarray, p: float) -> float | None:
    """The earlier convention: the upper edge of the first bin whose share reaches p."""
    reached = np.flatnonzero(arrived >= p - 1e-12)
    edge = DELAY_EDGES_HOURS[int(reached[0]) + 1] if reached.size else math.inf
    return edge if math.isfinite(edge) else None


def interpolated_quantile(arrived: np.ndarray, p: float) -> float | None:
    """The age in hours where a binned share `arrived` (at each bin's upper edge) reaches p.

    Linear within the bin that reaches p (labels spread evenly over it); None when p is not
    reached, or only in the last, open-ended bin.
    """
    # A hair of tolerance so that a share of exactly p, reached by rounding, counts.
    reached = np.flatnonzero(arrived >= p - 1e-12)
    if not reached.size:
        return None
    b = int(reached[0])
    lo, hi = DELAY_EDGES_HOURS[b], DELAY_EDGES_HOURS[b + 1]
    if not math.isfinite(hi):
        return None
    before = float(arrived[b - 1]) if b > 0 else 0.0
    step = float(arrived[b]) - before
    share = 1.0 if step <= 0.0 else min(max((p - before) / step, 0.0), 1.0)
    return lo + share * (hi - lo)


def _quantile_name(p: float) -> str:
    """'p50' for 0.5, 'p99' for 0.99, 'p99.9' for 0.999."""
    return "p" + format(round(p * 100, 6), "g")
