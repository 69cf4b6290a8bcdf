"""The `drift` block of binary windows: score PSI, Jensen-Shannon distance and the change of
the predicted positive rate, against the model's reference or a `baseline` range.

The reference is the period `belated.metrics.implied.reference_prior` describes (the model's
`reference` setting, or its first 30 settled days). A `baseline` query parameter replaces
it with any range of instants, given as `<start>/<end>` (ISO 8601 interval notation; each
end RFC 3339, without an offset read in the model's zone), aligned down to whole hours.
PSI and JS are computed on 10 bins at the reference's deciles (`belated.stats.drift`) and
are null, with the reason, unless both sides hold at least 100 predictions.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from belated.errors import invalid_field
from belated.metrics.load import ensure_fresh, epoch_hour, load_totals
from belated.metrics.params import parse_local
from belated.stats.drift import js_distance, psi
from belated.stats.values import Value
from belated.store.tables import ModelRow
from belated.store.totals import Totals
from belated.timeutil import iso, parse_ts
from belated.zones import zone

DRIFT_KEYS = ("score_psi", "score_js", "positive_rate_change")


@dataclass(frozen=True)
class Against:
    """What a window's drift is measured against: its score histogram (100 bins over all
    predictions), predictions and predicted positives, and where it comes from."""

    hist: np.ndarray
    predictions: int
    predicted_positive: int
    period: dict[str, Any]


def parse_baseline(value: str | None, time_zone: str) -> tuple[datetime, datetime] | None:
    """`<start>/<end>` as UTC instants aligned down to whole hours; a 422 naming `baseline`
    when it is not two times in order."""
    if not value:
        return None
    first, sep, second = value.partition("/")
    try:
        if not sep:
            raise ValueError
        tz = zone(time_zone)
        start, end = parse_local(first, tz), parse_local(second, tz)
    except (ValueError, TypeError, OverflowError):
        raise invalid_field(
            "baseline", "must be <start>/<end>, two RFC 3339 times separated by '/'"
        ) from None
    start = start.replace(minute=0, second=0, microsecond=0)
    end = end.replace(minute=0, second=0, microsecond=0)
    if end <= start:
        raise invalid_field("baseline", "its end must be at least an hour after its start")
    return start, end


def against_range(
    session: Session,
    model: ModelRow,
    start: datetime,
    end: datetime,
    filters: tuple[tuple[str, str], ...],
    now: datetime,
    period: dict[str, Any],
    *,
    refresh_to: int | None = None,
) -> Against:
    """The totals of [start, end) (whole hours; daily rows where both ends are UTC
    midnights), refreshed first when `refresh_to` (the max segment values) is given."""
    lo, hi = epoch_hour(start), epoch_hour(end)
    if refresh_to is not None:
        ensure_fresh(session, model, lo, hi, refresh_to)
    level = "d" if lo % 24 == 0 and hi % 24 == 0 else "h"
    acc = Totals()
    rows = load_totals(
        session, model, level=level, lo=lo, hi=hi, filters=filters, now=now, delays=False
    )
    for totals in rows.values():
        acc.add(totals)
    return Against(
        hist=acc.counts("hist").sum(axis=0),
        predictions=int(acc["n_pred"]),
        predicted_positive=int(acc["n_pred_pos"]),
        period=period,
    )


def reference_against(
    session: Session,
    model: ModelRow,
    period: dict[str, Any],
    filters: tuple[tuple[str, str], ...],
    now: datetime,
) -> Against | str:
    """The model's reference period (as `reference_prior` described it), or why none."""
    if period.get("start") is None or period.get("end") is None:
        return str(period.get("reason") or "no reference period yet")
    start, end = parse_ts(period["start"]), parse_ts(period["end"])
    described = {"kind": "reference", "start": period["start"], "end": period["end"]}
    return against_range(session, model, start, end, filters, now, described)


def baseline_against(
    session: Session,
    model: ModelRow,
    span: tuple[datetime, datetime],
    filters: tuple[tuple[str, str], ...],
    now: datetime,
    max_values: int,
) -> Against:
    """The `baseline` range given with the request (refreshed: it may hold recent writes)."""
    start, end = span
    described = {"kind": "baseline", "start": iso(start), "end": iso(end)}
    return against_range(session, model, start, end, filters, now, described, refresh_to=max_values)


def drift_block(
    against: Against | str, hist: np.ndarray, predictions: int, predicted_positive: int
) -> dict[str, Any]:
    """One window's drift: values, what they compare with, and a reason when one is null."""
    if isinstance(against, str):
        return {**dict.fromkeys(DRIFT_KEYS), "against": None, "reason": against}
    values: dict[str, Value] = {
        "score_psi": psi(against.hist, hist),
        "score_js": js_distance(against.hist, hist),
        "positive_rate_change": _rate_change(against, predictions, predicted_positive),
    }
    out: dict[str, Any] = {k: values[k].value for k in DRIFT_KEYS}
    out["against"] = against.period
    reasons = [f"{k}: {values[k].reason}" for k in DRIFT_KEYS if values[k].value is None]
    if reasons:
        out["reason"] = "; ".join(reasons)
    return out


def _rate_change(against: Against, predictions: int, predicted_positive: int) -> Value:
    if not against.predictions:
        return Value.undefined("no predictions in the reference")
    if not predictions:
        return Value.undefined("no predictions in the window")
    return Value(
        predicted_positive / predictions - against.predicted_positive / against.predictions
    )


def not_binary() -> dict[str, Any]:
    """The drift block of a multiclass window (score drift is defined on binary scores)."""
    return {
        **dict.fromkeys(DRIFT_KEYS),
        "against": None,
        "reason": "drift is computed for binary models",
    }
