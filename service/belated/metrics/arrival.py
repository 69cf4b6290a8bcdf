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
better).

Where delays depend on the score as well as the class (a confident flag is investigated
sooner), one curve per class biases the projection: the labels of high-score predictions
come sooner than the class's curve says, and those of low-score ones later. The rollups
therefore also keep the delays per class and score band (`delays_by_band`, ten bands of
0.1). Per class, bands are merged with their neighbours while their delays do not differ
(`belated.stats.homogeneity`: sparse bands join a neighbour, then adjacent groups whose
reverse-time log-rank test does not reject at 0.01), and each group left gets its curve; a
class whose bands all merge keeps its one curve. The projection then takes strata of score
bands split at the threshold (`belated.stats.strata.band_strata`) when the band curves
differ anywhere and the window's score histogram reproduces its confusion counts (a
threshold on a bin edge, unchanged over the window); else the strata of the class curves.

A segment (one tag filter) uses its own curves when each class has at least 200 labels in
the history used, else the whole model's (the band delays are kept for the whole model only,
so a segment's own curves are one per class); `Curves.source` says which ("segment" or
"model") and the window's `projected_curves` shows it.

Fitting reads months of rollups; a dashboard page asks for the same curves several times,
so one request (one session) fits them once per (model, segment, as-of): `model_curves`
keeps them in `session.info`.
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

from belated.classes import negative_class, positive_class
from belated.stats.arrival import MIN_LABELS, CurveFit, cohort_arrival, fit_arrival
from belated.stats.delays import delay_bin
from belated.stats.homogeneity import band_groups
from belated.stats.projection import confusion_of, project
from belated.stats.strata import Strata, band_strata, class_strata, score_bands
from belated.store.packing import unpack
from belated.store.rollup_tables import Rollup
from belated.store.statistics import HISTOGRAM_BY_NAME, N_BANDS, SCORE_CLASSES
from belated.store.tables import ModelRow
from belated.store.totals import Totals

MIN_HISTORY_DAYS = 90
MAX_HISTORY_DAYS = 400
PROJECTION_RESAMPLES = 200
HOURLY_COHORT_HOURS = 48  # younger cohorts are read by the hour, older ones by the day
_DELAYS = HISTOGRAM_BY_NAME["delays_by_class"]
_BANDED = HISTOGRAM_BY_NAME["delays_by_band"]
_SCORES = HISTOGRAM_BY_NAME["hist"]
_POS, _NEG = (_DELAYS.axes[0].index(c) for c in ("pos", "neg"))
_SCORE_NEG = SCORE_CLASSES.index("neg")
BANDS = score_bands(N_BANDS)
_MEMO_KEY = "belated.arrival_curves"


@dataclass(frozen=True)
class Curves:
    """The arrival curves of a model's two classes."""

    negative: CurveFit
    positive: CurveFit
    # the labelled share of cohorts older than the label delay: how many predictions are
    # ever labelled (1 with implied negatives); `eventual_known` when it was measured
    eventual_coverage: float = 1.0
    eventual_known: bool = False
    # per score band of BANDS, its (negative, positive) curves: a band of a group whose
    # delays do not differ from the class's others shares the class's curve object; None
    # when no class's bands differ (or the class curves are missing)
    bands: tuple[tuple[CurveFit, CurveFit], ...] | None = None
    # per class ("negative", "positive"), the groups of band indexes that share a curve
    band_groups: dict[str, list[list[int]]] | None = None
    # "model" or "segment": whose history the curves were fitted on
    source: str = "model"

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


def model_curves(
    session: Session,
    model: ModelRow,
    now: datetime,
    segment: tuple[str, str] | None = None,
) -> Curves:
    """The arrival curves of a binary model's classes (and score bands), from the rollups of
    the whole model, or of one segment when it has 200 labels of each class, over
    `history_days` before now (the caller has refreshed them). Kept on the session for the
    rest of the request."""
    key = (
        model.id,
        model.label_delay_days,
        model.negative_after_days,
        segment,
        now.timestamp(),
    )
    memo = session.info.setdefault(_MEMO_KEY, {})
    found = memo.get(key)
    if found is None:
        found = memo[key] = _fit_curves(session, model, now, segment)
    assert isinstance(found, Curves)
    return found


def _fit_curves(
    session: Session, model: ModelRow, now: datetime, segment: tuple[str, str] | None
) -> Curves:
    if segment is not None:
        own = _fit_on(session, model, now, segment)
        if own.complete:
            return own
        # too few labels of a class in the segment: the whole model's (memoised) curves
        return model_curves(session, model, now, None)
    return _fit_on(session, model, now, None)


def _fit_on(
    session: Session, model: ModelRow, now: datetime, segment: tuple[str, str] | None
) -> Curves:
    """Cohorts are hours over the last two days, where the hourly delay bins need them, and
    whole days before (a twentieth of the rows to decode). A day's cohort is taken at the
    age of its youngest hour: only the delays every prediction of the day has lived through
    count, which is the truncation the estimator expects (a few long delays of the day's
    older hours are left out)."""
    now_h = now.timestamp() / 3600
    lo = (int(now_h) - 24 * history_days(model)) // 24 * 24
    split = (int(now_h) - HOURLY_COHORT_HOURS) // 24 * 24
    c = Rollup.__table__.c
    cols = (
        Rollup.start,
        Rollup.level,
        c.n_pred,
        c.n_labelled,
        c.n_implied,
        c.delays_by_class,
        c.delays_by_band,
        c.hist,
    )
    seg_key, seg_value = segment if segment is not None else ("", "")
    scope = (Rollup.model_id == model.id, Rollup.seg_key == seg_key, Rollup.seg_value == seg_value)
    days = select(*cols).where(*scope, Rollup.level == "d")
    hours = select(*cols).where(*scope, Rollup.level == "h")
    rows = [
        *session.execute(days.where(Rollup.start >= lo, Rollup.start < split)),
        *session.execute(hours.where(Rollup.start >= split, Rollup.start <= int(now_h))),
    ]
    hists = np.zeros((len(rows), *_DELAYS.shape), np.int64)
    banded = np.zeros((len(rows), *_BANDED.shape), np.int64)
    neg_by_band = np.zeros((len(rows), N_BANDS), np.int64)  # labelled negatives, implied too
    implied = np.zeros(len(rows), np.int64)
    ages = np.zeros(len(rows), np.float64)
    old_pred = old_labelled = 0
    for i, (start, level, n_pred, n_labelled, n_implied, blob, band_blob, scores) in enumerate(
        rows
    ):
        if blob:
            hists[i] = unpack(_DELAYS, bytes(blob))[0]
        if band_blob:
            banded[i] = unpack(_BANDED, bytes(band_blob))[0]
        if scores and n_implied:
            neg = unpack(_SCORES, bytes(scores))[0][_SCORE_NEG]
            neg_by_band[i] = [neg[a:b].sum() for a, b in BANDS]
        implied[i] = n_implied
        # the age of the cohort's youngest hour, counted from that hour's start
        ages[i] = now_h - (start + (23 if level == "d" else 0))
        if ages[i] > 24 * model.label_delay_days:
            old_pred, old_labelled = old_pred + n_pred, old_labelled + n_labelled
    implied_after = (
        24.0 * model.negative_after_days if model.negative_after_days is not None else None
    )
    negative = fit_arrival(
        hists[:, _NEG],
        ages,
        implied=implied if implied_after is not None else None,
        implied_after_hours=implied_after,
    )
    positive = fit_arrival(hists[:, _POS], ages)
    bands, groups = None, None
    if negative.curve is not None and positive.curve is not None and banded.any():
        # implied negatives per band: the band's labelled negatives less its explicit ones
        implied_band = np.maximum(neg_by_band - banded[:, _NEG].sum(axis=2), 0)
        if implied_after is None:
            implied_band[:] = 0
        bands, groups = _band_curves(
            banded, implied_band, ages, implied_after, negative=negative, positive=positive
        )
    return Curves(
        negative=negative,
        positive=positive,
        eventual_coverage=1.0
        if implied_after is not None or not old_pred
        else max(old_labelled / old_pred, 1e-6),
        eventual_known=implied_after is not None or old_pred > 0,
        bands=bands,
        band_groups=groups,
        source="model" if segment is None else "segment",
    )


def _band_curves(
    banded: np.ndarray,
    implied_band: np.ndarray,
    ages: np.ndarray,
    implied_after: float | None,
    *,
    negative: CurveFit,
    positive: CurveFit,
) -> tuple[tuple[tuple[CurveFit, CurveFit], ...] | None, dict[str, list[list[int]]]]:
    """Per band its (negative, positive) curves, and per class the groups of bands sharing
    one; None for the bands when every class's bands form one group."""
    per_class: dict[str, list[CurveFit]] = {}
    groups: dict[str, list[list[int]]] = {}
    for name, c, whole in (("negative", _NEG, negative), ("positive", _POS, positive)):
        h = np.moveaxis(banded[:, c], 1, 0).astype(np.int64)  # (bands, cohorts, bins)
        if name == "negative" and implied_after is not None:
            h = h.copy()
            h[:, :, delay_bin(implied_after)] += implied_band.T
        found = band_groups(h, ages, min_labels=MIN_LABELS)
        groups[name] = found
        fits: list[CurveFit] = [whole] * N_BANDS
        if len(found) > 1:
            for group in found:
                fit = fit_arrival(
                    banded[:, c][:, group].sum(axis=1),
                    ages,
                    implied=implied_band[:, group].sum(axis=1)
                    if name == "negative" and implied_after is not None
                    else None,
                    implied_after_hours=implied_after if name == "negative" else None,
                )
                for b in group:
                    fits[b] = fit if fit.curve is not None else whole
        per_class[name] = fits
    if all(len(g) == 1 for g in groups.values()):
        return None, groups
    pairs = tuple(zip(per_class["negative"], per_class["positive"], strict=True))
    return pairs, groups


def curves_answer(curves: Curves, model: ModelRow) -> dict[str, Any]:
    """The arrival part of GET /delays: `arrival` holds per class its points (null without
    a curve), `arrival_labels` the labels each curve was fitted on, `arrival_reasons`
    why a class has no curve, and `arrival_by_band` per class its groups of score bands
    whose delays differ (`score_from`, `score_to`, `labels`, `arrival`), or null when one
    curve serves every score (the bands do not differ, or there are too few labels)."""
    pos = positive_class(model.positive, model.classes)
    neg = negative_class(model.positive, model.classes)
    arrival: dict[str, Any] = {}
    labels: dict[str, int] = {}
    reasons: dict[str, str] = {}
    for name, fit in ((pos, curves.positive), (neg, curves.negative)):
        arrival[name] = None if fit.curve is None else fit.curve.points()
        labels[name] = fit.n_labels
        if fit.curve is None:
            reasons[name] = f"{fit.reason} ({fit.n_labels} labels)"
    by_band: dict[str, Any] = {pos: None, neg: None}
    if curves.bands is not None and curves.band_groups is not None:
        for name, c in ((pos, 1), (neg, 0)):
            groups = curves.band_groups["positive" if c else "negative"]
            if len(groups) < 2:
                continue
            by_band[name] = [
                {
                    "score_from": BANDS[g[0]][0] / 100,
                    "score_to": BANDS[g[-1]][1] / 100,
                    "labels": curves.bands[g[0]][c].n_labels,
                    "arrival": None
                    if (fit := curves.bands[g[0]][c]).curve is None
                    else fit.curve.points(),
                }
                for g in groups
            ]
    return {
        "arrival": arrival,
        "arrival_labels": labels,
        "arrival_reasons": reasons,
        "arrival_by_band": by_band,
    }


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
    by_band = _band_strata(cohorts, curves, model, strata)
    strata = by_band if by_band is not None else strata
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
        "projected_curves": {
            "source": curves.source,
            "by": "band" if by_band is not None else "class",
        },
    }


def _band_strata(
    cohorts: list[tuple[datetime, timedelta, Totals]],
    curves: Curves,
    model: ModelRow,
    by_class: Strata,
) -> Strata | None:
    """Strata of score bands split at the threshold, when the curves differ by band and the
    cohorts' score histograms reproduce their confusion counts (else None: the threshold is
    not on a bin edge, or it changed within the window)."""
    if curves.bands is None or model.threshold is None:
        return None
    hists = [t.counts("hist") for _, _, t in cohorts]
    pos, neg = SCORE_CLASSES.index("pos"), SCORE_CLASSES.index("neg")
    strata = band_strata(
        hist_all=np.stack([h.sum(axis=0) for h in hists]),
        hist_neg=np.stack([h[neg] for h in hists]),
        hist_pos=np.stack([h[pos] for h in hists]),
        threshold=float(model.threshold),
        ages_hours=by_class.ages_hours,
        bands=BANDS,
        curves=curves.bands,
    )
    same = np.array_equal(
        confusion_of(strata.labelled, strata.predicted_positive),
        confusion_of(by_class.labelled, by_class.predicted_positive),
    ) and np.array_equal(
        strata.predictions[:, strata.predicted_positive].sum(axis=1),
        by_class.predictions[:, 1],
    )
    return strata if same else None


def _round(x: float | None) -> float | None:
    return None if x is None or not math.isfinite(x) else round(float(x), 6)
