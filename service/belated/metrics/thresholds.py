"""The threshold sweep over a time range: measures at every bin edge, recommended thresholds."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy.orm import Session

from belated.metrics.load import ensure_fresh, epoch_hour, load_totals
from belated.stats.thresholds import sweep
from belated.store.tables import ModelRow
from belated.store.totals import Totals


def over_range(
    session: Session,
    model: ModelRow,
    *,
    start: datetime,
    end: datetime,
    beta: float,
    precision_target: float | None,
    recall_target: float | None,
    now: datetime,
    max_values: int,
) -> dict[str, Any]:
    """Measures at every bin edge over the labelled predictions of [start, end)."""
    lo, hi = epoch_hour(start), epoch_hour(end)
    ensure_fresh(session, model, lo, hi, max_values)
    total = Totals()
    for acc in load_totals(session, model, level="h", lo=lo, hi=hi, filters=(), now=now).values():
        total.add(acc)
    answer = sweep(
        total.score_counts("pos"),
        total.score_counts("neg"),
        beta=beta,
        precision_target=precision_target,
        recall_target=recall_target,
    )
    answer["labelled"] = int(total.score_counts("pos").sum() + total.score_counts("neg").sum())
    return answer
