"""The `implied` block of binary windows: measures implied by the scores alone.

The posteriors (scores) are first moved to each window's prior, re-estimated by EM (Saerens,
Latinne and Decaestecker 2002), with the model's reference prevalence as the training prior;
then expected TP = sum of p over predicted positives, FP = sum of 1 - p over them, and FN,
TN likewise over predicted negatives give implied precision, recall, F-beta and prevalence.
The reference is a fixed, settled period (DESIGN.md "reference"; default: the first 30
settled days of the model), not the trailing windows: trailing windows that have already
shifted would pull the training prior along and hide the shift.

The rollups keep the scores as a histogram of 100 bins with the score sum of each bin, so a
bin's predictions are moved together at their mean score, and the predicted side of a bin is
read from the threshold (a bin at or above it is predicted positive): exact for the
threshold rule, an approximation for models that send their own `predicted`.

Without a settled reference the block carries the unadjusted expected counts' measures and
says so in `adjusted: false` with the reason.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.stats.estimates import em_prior_many, expected_measures, first_positive_bin
from belated.stats.window import WindowStats
from belated.store.rollup_tables import Rollup
from belated.store.tables import ModelRow
from belated.timeutil import parse_ts

REFERENCE_DAYS = 30
IMPLIED = ("precision", "recall", "fbeta", "prevalence")


def reference_prior(
    session: Session, model: ModelRow, now: datetime
) -> tuple[float | None, dict[str, Any]]:
    """The reference prevalence and a description of the period it comes from: the model's
    `reference` range, or else the first `REFERENCE_DAYS` days from its first prediction;
    of either, the days whose end is more than the label delay in the past (settled by
    age). None with the reason when no such day holds labels."""
    c = Rollup.__table__.c
    if model.reference:
        return _prevalence(session, model, parse_ts(model.reference["start"]),
                           min(parse_ts(model.reference["end"]),
                               now - timedelta(days=model.label_delay_days)))  # fmt: skip
    first = session.scalar(
        select(Rollup.start)
        .where(Rollup.model_id == model.id, Rollup.level == "d", Rollup.seg_key == "")
        .where(c.n_pred > 0)
        .order_by(Rollup.start)
        .limit(1)
    )
    if first is None:
        return None, {"start": None, "end": None, "reason": "no predictions yet"}
    start = datetime.fromtimestamp(first * 3600, UTC)
    settled_until = now - timedelta(days=model.label_delay_days)
    end = min(start + timedelta(days=REFERENCE_DAYS), settled_until)
    end = end.replace(hour=0, minute=0, second=0, microsecond=0) if end > start else start
    return _prevalence(session, model, start, end)


def _prevalence(
    session: Session, model: ModelRow, start: datetime, end: datetime
) -> tuple[float | None, dict[str, Any]]:
    """The share of positives among the labels of the whole days in [start, end)."""
    c = Rollup.__table__.c
    first = int(start.timestamp() // 3600)
    row = session.execute(
        select(c.tp.label("tp"), c.fp.label("fp"), c.fn.label("fn"), c.tn.label("tn")).where(
            Rollup.model_id == model.id,
            Rollup.level == "d",
            Rollup.seg_key == "",
            Rollup.seg_value == "",
            Rollup.start >= first,
            Rollup.start + 24 <= int(end.timestamp() // 3600),
        )
    ).all()
    positives = sum(int(r.tp) + int(r.fn) for r in row)
    labelled = sum(int(r.tp) + int(r.fp) + int(r.fn) + int(r.tn) for r in row)
    period = {"start": start.isoformat().replace("+00:00", "Z"), "end": None}
    if not labelled or end <= start:
        return None, {**period, "reason": "no settled labelled day yet to take as reference"}
    period["end"] = end.isoformat().replace("+00:00", "Z")
    prior = positives / labelled
    if not 0 < prior < 1:
        return None, {**period, "reason": "the reference holds one class only"}
    return prior, {**period, "prevalence": prior, "labelled": labelled}


def implied_blocks(
    stats: list[WindowStats], model: ModelRow, prior: float | None, beta: float
) -> list[dict[str, Any]]:
    """The implied measures of every window, in one vectorised EM pass."""
    if not stats:
        return []
    if prior is None:
        return [_unadjusted(s, beta) for s in stats]
    hists = np.array([s.hist_all for s in stats], dtype=np.float64)
    ssums = np.array([s.ssum_all for s in stats], dtype=np.float64)
    priors = em_prior_many(hists, ssums, np.full(len(stats), prior))
    filled = hists > 0
    p = np.where(filled, np.clip(ssums / np.where(filled, hists, 1.0), 0.0, 1.0), 0.0)
    cut = first_positive_bin(model.threshold)
    out: list[dict[str, Any]] = []
    for i, s in enumerate(stats):
        q = priors[i]
        if q is None or not np.isfinite(q) or not hists[i].any():
            out.append(_unadjusted(s, beta))
            continue
        up = q / prior * p[i]
        down = (1.0 - q) / (1.0 - prior) * (1.0 - p[i])
        with np.errstate(invalid="ignore", divide="ignore"):
            adjusted = np.where(up + down > 0, up / (up + down), p[i])
        exp_tp = float(np.dot(hists[i, cut:], adjusted[cut:]))
        exp_fn = float(np.dot(hists[i, :cut], adjusted[:cut]))
        measures = expected_measures(
            exp_tp,
            float(hists[i, cut:].sum()) - exp_tp,
            exp_fn,
            float(hists[i, :cut].sum()) - exp_fn,
            beta=beta,
        )
        out.append({**_values(measures), "adjusted": True})
    return out


def _unadjusted(s: WindowStats, beta: float) -> dict[str, Any]:
    measures = expected_measures(
        float(s.exp_tp), float(s.exp_fp), float(s.exp_fn), float(s.exp_tn), beta=beta
    )
    return {**_values(measures), "adjusted": False}


def _values(measures: dict[str, Any]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for name in IMPLIED:
        value = measures[name]
        out[name] = {"value": value.value}
        if value.reason is not None:
            out[name]["reason"] = value.reason
    return out
