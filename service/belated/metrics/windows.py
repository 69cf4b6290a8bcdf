"""Assemble the windows of GET /v1/models/{model}/metrics from accumulated statistics."""

from __future__ import annotations

from bisect import bisect_right
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta, tzinfo
from typing import Any

import numpy as np
import orjson
from sqlalchemy.orm import Session

from belated.metrics.arrival import (
    Curves,
    model_curves,
    projected,
    settled_by_class,
)
from belated.metrics.drift import baseline_against, drift_block, not_binary, reference_against
from belated.metrics.implied import implied_blocks, reference_prior
from belated.metrics.load import ensure_fresh, epoch_hour, load_hour_spans, load_totals
from belated.metrics.params import Range
from belated.stats.calibration import ece_arrays
from belated.stats.multiclass import summarise_multiclass
from belated.stats.summary import summarise_many
from belated.stats.window import WindowStats
from belated.store.statistics import HISTOGRAM_BY_NAME, SCALARS, SCORE_CLASSES
from belated.store.tables import ModelRow
from belated.store.totals import Totals
from belated.zones import DEFAULT_ZONE, local_iso

CALIBRATION_WINDOWS = 7


@dataclass(frozen=True)
class MeasureOptions:
    """How to compute measures."""

    beta: float = 1.0
    interval: str = "wilson"
    confidence: float = 0.95
    resamples: int = 200
    measures: frozenset[str] | None = None
    rolling: int = 1
    # drift against this [start, end) in place of the model's reference
    baseline: tuple[datetime, datetime] | None = None


def to_stats(totals: Totals) -> WindowStats:
    """The pure measures' input from a window's totals, field by declared name."""
    scalars: dict[str, Any] = {s.name: totals[s.name] for s in SCALARS}
    scores, sums = totals.counts("hist"), totals.sums("hist")
    return WindowStats(
        **scalars,
        hist_all=scores.sum(axis=0),
        ssum_all=sums.sum(axis=0),
        hist_pos=totals.score_counts("pos").copy(),
        ssum_pos=totals.score_sums("pos").copy(),
        hist_neg=totals.score_counts("neg").copy(),
        ssum_neg=totals.score_sums("neg").copy(),
        delay_hist=totals.counts("delays").copy(),
    )


Cohort = tuple[datetime, timedelta, Totals]  # a rollup row: its start, length and totals


def window_rows(
    session: Session,
    model: ModelRow,
    rng: Range,
    lookback: int,
    filters: tuple[tuple[str, str], ...],
    now: datetime,
) -> tuple[list[datetime], list[list[Cohort]]]:
    """The rollup rows of each base window of the range and of `lookback` windows before it
    (the caller has refreshed the range: see `ensure_fresh`).

    Daily rollup rows are UTC days. A day or week window takes the daily rows of the UTC
    days that lie wholly inside it, and the hourly rows of a UTC day that a window boundary
    cuts (a local midnight that is not a UTC midnight): a UTC model reads daily rows only,
    a Berlin model's days are all cut (24 hourly rows each) and its weeks only at their two
    ends."""
    bounds = rng.bounds(lookback)
    starts = bounds[:-1]
    hours = [epoch_hour(b) for b in bounds]
    lo, hi = hours[0], hours[-1]
    found: list[tuple[int, int, Totals]] = []  # (start hour, length in hours, totals)
    if rng.granularity == "hour":
        rows = load_totals(
            session, model, level="h", lo=lo, hi=hi, filters=filters, now=now, delays=False
        )
        found = [(h, 1, t) for h, t in rows.items()]
    else:
        cut = sorted({h - h % 24 for h in hours if h % 24})
        days = load_totals(
            session, model, level="d", lo=lo, hi=hi, filters=filters, now=now, delays=False
        )
        whole = set(cut)
        found = [(d, 24, t) for d, t in days.items() if d not in whole and lo <= d and d + 24 <= hi]
        spans = _merged([(d, d + 24) for d in cut])
        cut_hours = load_hour_spans(
            session, model, spans=spans, filters=filters, now=now, delays=False
        )
        found += [(h, 1, t) for h, t in cut_hours.items()]
    parts: list[list[Cohort]] = [[] for _ in starts]
    for start, length, totals in sorted(found, key=lambda f: f[0]):
        i = bisect_right(hours, start) - 1
        if 0 <= i < len(parts):
            cohort_start = datetime.fromtimestamp(start * 3600, UTC)
            parts[i].append((cohort_start, timedelta(hours=length), totals))
    return starts, parts


def _merged(spans: list[tuple[int, int]]) -> list[tuple[int, int]]:
    """Sorted spans with touching ones joined (fewer OR terms in the query)."""
    out: list[tuple[int, int]] = []
    for lo, hi in spans:
        if out and out[-1][1] >= lo:
            out[-1] = (out[-1][0], max(out[-1][1], hi))
        else:
            out.append((lo, hi))
    return out


def _sum(cohorts: list[Cohort]) -> Totals:
    out = Totals()
    for _, _, totals in cohorts:
        out.add(totals)
    return out


def window_totals(
    session: Session,
    model: ModelRow,
    rng: Range,
    lookback: int,
    filters: tuple[tuple[str, str], ...],
    now: datetime,
) -> tuple[list[datetime], list[Totals]]:
    """The totals of each base window of the range and of `lookback` windows before it
    (the caller has refreshed the range: see `ensure_fresh`)."""
    starts, parts = window_rows(session, model, rng, lookback, filters, now)
    return starts, [_sum(p) for p in parts]


def settled_window(
    totals: Totals, end: datetime, model: ModelRow, now: datetime, curves: Curves | None = None
) -> bool:
    """Whether a window's labels are in (DESIGN.md "settled"; see metrics/arrival.py)."""
    return settled_by_class(totals, end, model, now, curves)


def curves_of(
    session: Session,
    model: ModelRow,
    now: datetime,
    filters: tuple[tuple[str, str], ...] = (),
) -> Curves | None:
    """A binary model's arrival curves (None for a multiclass model). They are fitted on the
    rollups as the last refresh left them, not refreshed for the read: a curve is an estimate
    over months of cohorts, which the labels of the last minute do not move, and refreshing
    its whole history would make every read pay for every write. One tag filter: the
    segment's own curves when it has the labels for them (several filters: the model's)."""
    if model.kind != "binary":
        return None
    return model_curves(session, model, now, filters[0] if len(filters) == 1 else None)


def windows_of_range(
    session: Session,
    model: ModelRow,
    rng: Range,
    opts: MeasureOptions,
    filters: tuple[tuple[str, str], ...],
    now: datetime,
    max_values: int,
) -> list[dict[str, Any]]:
    """The windows of the range, oldest first, contiguous (empty ones have zero counts).

    Day and week windows start at midnight in the model's `time_zone` (a range aligned in
    another zone is aligned again); a rolling window spans from its first part's start."""
    rng = rng.in_zone(model.time_zone or DEFAULT_ZONE)
    tz = rng.tz
    lookback = opts.rolling - 1 + CALIBRATION_WINDOWS * 2
    lo, hi = epoch_hour(rng.bounds(lookback)[0]), epoch_hour(rng.end)
    ensure_fresh(session, model, lo, hi, max_values)
    curves = curves_of(session, model, now, filters)
    starts, rows = window_rows(session, model, rng, lookback, filters, now)
    ends = [*starts[1:], rng.end]
    base = [_sum(r) for r in rows]
    settled = [settled_window(a, e, model, now, curves) for a, e in zip(base, ends, strict=True)]
    out: list[dict[str, Any]] = []
    # (window, its statistics, the calibration error of the trailing settled windows)
    binary: list[tuple[dict[str, Any], WindowStats, float | None]] = []
    references = _references(base, settled) if model.kind == "binary" else []
    for i in range(lookback, len(starts)):
        parts = range(max(0, i - opts.rolling + 1), i + 1)
        acc = Totals()
        for j in parts:
            acc.add(base[j])
        window = _counts_block(acc, starts[parts[0]], ends[i], now, tz)
        window["settled"] = all(settled[j] for j in parts)
        window.update(
            _late_labels(window, [c for j in parts for c in rows[j]], curves, model, now, opts)
        )
        if model.kind == "binary":
            ece_value, _ = references[i]
            binary.append((window, to_stats(acc), ece_value))
        else:
            window.update(_multiclass(model, acc, opts))
            window["drift"] = not_binary()
        out.append(window)
    if binary:
        # every binary window in one vectorised pass; each answer equals summarise() alone
        summaries = summarise_many(
            [b[1] for b in binary],
            beta=opts.beta,
            interval=opts.interval,
            confidence=opts.confidence,
            resamples=opts.resamples,
            measures=set(opts.measures) if opts.measures else None,
        )
        prior, period = reference_prior(session, model, now)
        implied = implied_blocks([b[1] for b in binary], model, prior, opts.beta)
        against = (
            reference_against(session, model, period, filters, now)
            if opts.baseline is None
            else baseline_against(session, model, opts.baseline, filters, now, max_values)
        )
        for (window, stats, ece), summary, block in zip(binary, summaries, implied, strict=True):
            summary.pop("implied", None)
            window.update(summary)
            window["implied"] = {**block, "calibration_error": ece, "reference": period}
            window["drift"] = drift_block(against, stats.hist_all, stats.n_pred, stats.n_pred_pos)
    return out


def _late_labels(
    window: dict[str, Any],
    cohorts: list[Cohort],
    curves: Curves | None,
    model: ModelRow,
    now: datetime,
    opts: MeasureOptions,
) -> dict[str, Any]:
    """`projected`, `expected_final_coverage`, `settles_by` and `projected_curves` (whose
    curves served: the segment's or the model's, per band or per class); null on settled
    windows."""
    empty: dict[str, Any] = {
        "projected": None,
        "expected_final_coverage": None,
        "settles_by": None,
        "projected_curves": None,
    }
    if window["settled"] or curves is None or not window["predictions"]:
        return empty
    answer = projected(cohorts, curves, model, now, beta=opts.beta, confidence=opts.confidence)
    if opts.measures:
        answer["projected"] = {k: v for k, v in answer["projected"].items() if k in opts.measures}
    answer.pop("arrived_share", None)
    answer.pop("counts", None)
    return answer


def _references(base: list[Totals], settled: list[bool]) -> list[tuple[float | None, float | None]]:
    """For each window, the ECE and prevalence of the trailing settled windows before it:
    label-free estimates hold only for calibrated scores, and EM re-estimates the prior
    from there. All windows at once: each one's last few settled, labelled windows are
    gathered into a (windows, CALIBRATION_WINDOWS) index and summed."""
    if not base:
        return []
    shape = HISTOGRAM_BY_NAME["hist"].shape
    hist = np.stack([np.zeros(shape, np.int64), *(a.counts("hist") for a in base)])
    hsum = np.stack([np.zeros(shape, np.float64), *(a.sums("hist") for a in base)])
    useful = np.array(
        [i + 1 for i, a in enumerate(base) if settled[i] and a["n_labelled"]], dtype=np.int64
    )  # +1: row 0 of the stacks is the empty window
    before = np.searchsorted(useful, np.arange(1, len(base) + 1), side="left")
    offsets = np.arange(-CALIBRATION_WINDOWS, 0)
    pick = before[:, None] + offsets[None, :]
    index = np.where(pick >= 0, np.concatenate([[0], useful])[np.maximum(pick, -1) + 1], 0)
    # oldest first, one column at a time: memory of one (windows, 3, 100) array, not seven
    h = np.zeros((len(base), *shape), np.int64)
    s = np.zeros((len(base), *shape), np.float64)
    for k in range(CALIBRATION_WINDOWS):
        h += hist[index[:, k]]
        s += hsum[index[:, k]]
    pos, neg = SCORE_CLASSES.index("pos"), SCORE_CLASSES.index("neg")
    labelled = h[:, pos].sum(axis=-1) + h[:, neg].sum(axis=-1)
    values = ece_arrays(h[:, pos], s[:, pos], h[:, neg], s[:, neg])
    out: list[tuple[float | None, float | None]] = []
    for i in range(len(base)):
        if before[i] == 0:
            out.append((None, None))
            continue
        value = float(values[i])
        prior = float(h[i, pos].sum() / labelled[i]) if labelled[i] else None
        out.append((None if value != value else value, prior))
    return out


def _counts_block(
    acc: Totals, start: datetime, end: datetime, now: datetime, tz: tzinfo
) -> dict[str, Any]:
    n, labelled = acc["n_pred"], acc["n_labelled"]
    return {
        "start": local_iso(start, tz),
        "end": local_iso(end, tz),
        "closed": end <= now,
        "predictions": n,
        "labelled": labelled,
        "implied_negatives": acc["n_implied"],
        "coverage": round(labelled / n, 6) if n else None,
    }


def _multiclass(model: ModelRow, acc: Totals, opts: MeasureOptions) -> dict[str, Any]:
    classes = list(model.classes)
    matrix = np.zeros((len(classes), len(classes)), np.int64)
    pos = {c: k for k, c in enumerate(classes)}
    for key, count in (acc.cells or {}).items():
        actual, predicted = orjson.loads(key)
        if actual in pos and predicted in pos:
            matrix[pos[actual], pos[predicted]] += count
    summary = summarise_multiclass(
        matrix,
        classes,
        beta=opts.beta,
        interval=opts.interval,
        confidence=opts.confidence,
        resamples=opts.resamples,
    )
    if opts.measures:
        summary["measures"] = {k: v for k, v in summary["measures"].items() if k in opts.measures}
    return summary
