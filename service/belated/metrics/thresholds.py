"""The threshold sweep over a time range: measures at every bin edge, recommended thresholds.

Early labels are a biased sample (returns come back within days, kept orders are confirmed
weeks later), so by default the advice is built on the settled days of the last 30 days only;
a range given by the caller is used whole, and the answer says how many of its labelled
predictions lie in days that are not settled yet. Advice (best F-beta, the thresholds meeting
targets) built on fewer than MIN_POSITIVES labelled positives is withheld with the reason; the
sweep rows are returned either way.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy.orm import Session

from belated.metrics.load import ensure_fresh, epoch_hour, load_totals
from belated.metrics.windows import curves_of, settled_window
from belated.stats.thresholds import sweep
from belated.store.tables import ModelRow
from belated.store.totals import Totals
from belated.timeutil import floor_window, iso

MIN_POSITIVES = 100
DEFAULT_DAYS = 30
ADVICE = ("best_fbeta", "for_precision", "for_recall")
DAY = timedelta(days=1)


def _day_of(hour: int) -> datetime:
    return floor_window(datetime.fromtimestamp(hour * 3600, UTC), "day")


def _labelled(acc: Totals) -> tuple[int, int]:
    """Labelled positives and negatives (explicit or implied) of some hours."""
    return int(acc.score_counts("pos").sum()), int(acc.score_counts("neg").sum())


def over_range(
    session: Session,
    model: ModelRow,
    *,
    start: datetime,
    end: datetime,
    settled_only: bool,
    beta: float,
    precision_target: float | None,
    recall_target: float | None,
    now: datetime,
    max_values: int,
    filters: tuple[tuple[str, str], ...] = (),
) -> dict[str, Any]:
    """Measures at every bin edge over the labelled predictions of [start, end) that carry
    every tag of `filters`; with `settled_only`, over the settled days of the range only.

    A day's settledness is that of the model's day window (`settled_window`) on the day's
    whole counts under the same filters, so a segment settles by its own counts. The range
    block counts the days with predictions, settled and not.
    """
    first = floor_window(start, "day")
    last = floor_window(end, "day")
    if last < end:
        last += DAY
    lo, hi = epoch_hour(first), epoch_hour(last)
    ensure_fresh(session, model, lo, hi, max_values)
    hourly = load_totals(
        session, model, level="h", lo=lo, hi=hi, filters=filters, now=now, delays=False
    )
    whole: dict[datetime, Totals] = {}
    inside: dict[datetime, Totals] = {}
    in_lo, in_hi = epoch_hour(start), epoch_hour(end)
    for hour, acc in hourly.items():
        day = _day_of(hour)
        whole.setdefault(day, Totals()).add(acc)
        if in_lo <= hour < in_hi:
            inside.setdefault(day, Totals()).add(acc)
    curves = curves_of(session, model, now)
    used = Totals()
    unsettled_labelled = 0
    settled_days = unsettled_days = 0
    day = first
    while day < last:
        day_totals = whole.get(day, Totals())
        settled = settled_window(day_totals, day + DAY, model, now, curves)
        if day_totals["n_pred"]:  # days with predictions are counted
            settled_days += settled
            unsettled_days += not settled
        part = inside.get(day)
        if part is not None:
            if not settled:
                unsettled_labelled += sum(_labelled(part))
            if settled or not settled_only:
                used.add(part)
        day += DAY
    answer = sweep(
        used.score_counts("pos"),
        used.score_counts("neg"),
        beta=beta,
        precision_target=precision_target,
        recall_target=recall_target,
    )
    n_pos, n_neg = _labelled(used)
    reason = None
    if n_pos < MIN_POSITIVES:
        where = "the settled days of the range" if settled_only else "the range"
        reason = (
            f"only {n_pos} labelled positives in {where}; advice needs at least {MIN_POSITIVES}"
        )
        for name in ADVICE:
            answer[name] = None
    return {
        "range": {
            "start": iso(start),
            "end": iso(end),
            "settled_only": settled_only,
            "settled_days": settled_days,
            "unsettled_days": unsettled_days,
        },
        "labelled": n_pos + n_neg,
        "labelled_positives": n_pos,
        "labelled_negatives": n_neg,
        "unsettled_labelled": unsettled_labelled,
        "advice_reason": reason,
        **answer,
    }
