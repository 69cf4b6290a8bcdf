"""Arrival curves of a model from its rollups, and what they say about a window.

The curves (one per actual class, `belated.stats.arrival`) are fitted on the hourly rollups
of the whole model over a history of `history_days` before now: per hourly cohort the label
delays of each class (`delays_by_class`), the implied negatives, and the cohort's age. They
serve three things: `GET /delays` draws them, a window is settled by class (its coverage and
every class's arrival at its age at least `min_coverage`), and an unsettled window gets
`projected` measures (`belated.stats.projection`), `expected_final_coverage` and
`settles_by`.

A window's cohorts are its rollup rows: hours for hourly windows, days for daily and weekly
ones (a day's predictions are taken at the day's middle age, which is within 12 hours of
each prediction's own; the curves are hourly below 48 hours, where hourly windows serve
better). Segments use the whole model's curves: a segment rarely has the 200 labels per
class a curve needs, and a change in a segment's delays is itself worth an alert.
"""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.stats.arrival import CurveFit, cohort_arrival, fit_arrival
from belated.stats.projection import project
from belated.stats.strata import class_strata
from belated.store.packing import unpack
from belated.store.rollup_tables import Rollup
from belated.store.statistics import HISTOGRAM_BY_NAME
from belated.store.tables import ModelRow
from belated.store.totals import Totals

MIN_HISTORY_DAYS = 90
MAX_HISTORY_DAYS = 400
PROJECTION_RESAMPLES = 200
HOURLY_COHORT_HOURS = 48  # younger cohorts are read by the hour, older ones by the day
_DELAYS = HISTOGRAM_BY_NAME["delays_by_class"]
_POS, _NEG = (_DELAYS.axes[0].index(c) for c in ("pos", "neg"))


@dataclass(frozen=True)
class Curves:
    """The arrival curves of a model's two classes."""

    negative: CurveFit
    positive: CurveFit
    # the labelled share of cohorts older than the label delay: how many predictions are
    # ever labelled (1 with implied negatives); `eventual_known` when it was measured
    eventual_coverage: float = 1.0
    eventual_known: bool = False

    @property
    def complete(self) -> bool:
        """Both classes have a curve."""
        return self.negative.curve is not None and self.positive.curve is not None

    def arrived_at(self, age_hours: float) -> tuple[float, float] | None:
        """Each class's share of labels arrived (negative, positive) for a cohort of that
        age, or None without both curves."""
        if self.negative.curve is None or self.positive.curve is None:
            return None
        ages = np.array([age_hours])
        neg = float(cohort_arrival(self.negative.curve, ages)[0][0])
        pos = float(cohort_arrival(self.positive.curve, ages)[0][0])
        return neg, pos


def history_days(model: ModelRow) -> int:
    """Days of hourly cohorts the curves are fitted on: long enough to hold complete
    cohorts for the model's label delay several times over."""
    longest = max(model.label_delay_days, model.negative_after_days or 0)
    return int(min(MAX_HISTORY_DAYS, max(MIN_HISTORY_DAYS, 4 * longest)))


def model_curves(session: Session, model: ModelRow, now: datetime) -> Curves:
    """The arrival curves of a binary model's classes, from the rollups of the whole model
    over `history_days` before now (the caller has refreshed them).

    Cohorts are hours over the last two days, where the hourly delay bins need them, and
    whole days before (a twentieth of the rows to decode). A day's cohort is taken at the
    age of its youngest hour: only the delays every prediction of the day has lived through
    count, which is the truncation the estimator expects (a few long delays of the day's
    older hours are left out)."""
    now_h = now.timestamp() / 3600
    lo = (int(now_h) - 24 * history_days(model)) // 24 * 24
    split = (int(now_h) - HOURLY_COHORT_HOURS) // 24 * 24
    c = Rollup.__table__.c
    cols = (Rollup.start, Rollup.level, c.n_pred, c.n_labelled, c.n_implied, c.delays_by_class)
    whole_model = (Rollup.model_id == model.id, Rollup.seg_key == "", Rollup.seg_value == "")
    days = select(*cols).where(*whole_model, Rollup.level == "d")
    hours = select(*cols).where(*whole_model, Rollup.level == "h")
    rows = [
        *session.execute(days.where(Rollup.start >= lo, Rollup.start < split)),
        *session.execute(hours.where(Rollup.start >= split, Rollup.start <= int(now_h))),
    ]
    hists = np.zeros((len(rows), *_DELAYS.shape), np.int64)
    implied = np.zeros(len(rows), np.int64)
    ages = np.zeros(len(rows), np.float64)
    old_pred = old_labelled = 0
    for i, (start, level, n_pred, n_labelled, n_implied, blob) in enumerate(rows):
        if blob:
            hists[i] = unpack(_DELAYS, bytes(blob))[0]
        implied[i] = n_implied
        # the age of the cohort's youngest hour, counted from that hour's start
        ages[i] = now_h - (start + (23 if level == "d" else 0))
        if ages[i] > 24 * model.label_delay_days:
            old_pred, old_labelled = old_pred + n_pred, old_labelled + n_labelled
    implied_after = (
        24.0 * model.negative_after_days if model.negative_after_days is not None else None
    )
    return Curves(
        negative=fit_arrival(
            hists[:, _NEG],
            ages,
            implied=implied if implied_after is not None else None,
            implied_after_hours=implied_after,
        ),
        positive=fit_arrival(hists[:, _POS], ages),
        eventual_coverage=1.0
        if implied_after is not None or not old_pred
        else max(old_labelled / old_pred, 1e-6),
        eventual_known=implied_after is not None or old_pred > 0,
    )


def curves_answer(curves: Curves, model: ModelRow) -> dict[str, Any]:
    """The arrival part of GET /delays: `arrival` holds per class its points (null without
    a curve), `arrival_labels` the labels each curve was fitted on, and `arrival_reasons`
    why a class has no curve."""
    pos = model.positive or model.classes[-1]
    arrival: dict[str, Any] = {}
    labels: dict[str, int] = {}
    reasons: dict[str, str] = {}
    for name, fit in ((pos, curves.positive), (_negative(model), curves.negative)):
        arrival[name] = None if fit.curve is None else fit.curve.points()
        labels[name] = fit.n_labels
        if fit.curve is None:
            reasons[name] = f"{fit.reason} ({fit.n_labels} labels)"
    return {"arrival": arrival, "arrival_labels": labels, "arrival_reasons": reasons}


def _negative(model: ModelRow) -> str:
    pos = model.positive or model.classes[-1]
    return next((c for c in model.classes if c != pos), "0")


def settled_by_class(
    totals: Totals, end: datetime, model: ModelRow, now: datetime, curves: Curves | None
) -> bool:
    """DESIGN.md "settled": closed, and either older than the label delay, or covered to
    `min_coverage` while every class's arrival at the window's age is as high. Coverage
    alone never settles a window; without both curves only the age rule applies."""
    if end > now:
        return False
    if totals["n_pred"] == 0 or end + timedelta(days=model.label_delay_days) < now:
        return True
    if curves is None:
        return False
    arrived = curves.arrived_at((now - end) / timedelta(hours=1))
    if arrived is None:
        return False
    coverage = totals["n_labelled"] / totals["n_pred"]
    return coverage >= model.min_coverage and min(arrived) >= model.min_coverage


def projected(
    cohorts: list[tuple[datetime, timedelta, Totals]],
    curves: Curves,
    model: ModelRow,
    now: datetime,
    *,
    beta: float,
    confidence: float,
) -> dict[str, Any]:
    """`projected`, `expected_final_coverage` and `settles_by` of an unsettled window made
    of `cohorts` (start, length, totals of each rollup row)."""
    ages = np.array(
        [(now - (s + length / 2)) / timedelta(hours=1) + 0.5 for s, length, _ in cohorts]
    )

    def column(name: str) -> np.ndarray:
        return np.array([t[name] for _, _, t in cohorts], np.int64)

    strata = class_strata(
        n_pred=column("n_pred"),
        n_pred_pos=column("n_pred_pos"),
        tp=column("tp"),
        fp=column("fp"),
        fn=column("fn"),
        tn=column("tn"),
        ages_hours=np.maximum(ages, 0.5),
        negative=curves.negative,
        positive=curves.positive,
    )
    seed = zlib.crc32(repr(sorted(column("n_pred").tolist())).encode()) ^ int(ages.sum())
    answer = project(
        strata,
        beta=beta,
        confidence=confidence,
        resamples=PROJECTION_RESAMPLES,
        seed=seed,
        eventual_coverage=curves.eventual_coverage,
        min_coverage=model.min_coverage,
        # with the share labelled at last known, one class's arrival identifies the rest
        one_class_suffices=curves.eventual_known,
    )
    hours = answer.get("settles_in_hours")
    by_age = cohorts[-1][0] + cohorts[-1][1] + timedelta(days=model.label_delay_days)
    settles = by_age if hours is None else min(by_age, now + timedelta(hours=float(hours)))
    return {
        "projected": answer["measures"],
        # the share labelled at last, as settled history shows it (1 with implied negatives)
        "expected_final_coverage": _round(
            curves.eventual_coverage if curves.eventual_known else answer["expected_final_coverage"]
        ),
        "settles_by": settles.date().isoformat(),
        "arrived_share": _round(answer.get("arrived_share")),
        "counts": answer.get("counts"),  # the projected final confusion counts (early rules)
    }


def _round(x: float | None) -> float | None:
    return None if x is None or not math.isfinite(x) else round(float(x), 6)
