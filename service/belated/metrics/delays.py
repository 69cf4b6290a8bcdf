"""Label delays over a time range: Kaplan-Meier quantiles and coverage by window age."""

from __future__ import annotations

from datetime import datetime
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from belated.metrics.arrival import curves_answer, model_curves
from belated.metrics.load import ensure_fresh, epoch_hour, load_totals
from belated.stats.delays import km_quantiles
from belated.store.tables import ModelRow
from belated.store.totals import Totals


def over_range(
    session: Session,
    model: ModelRow,
    *,
    start: datetime,
    end: datetime,
    now: datetime,
    max_values: int,
) -> dict[str, Any]:
    """Kaplan-Meier delay quantiles (unlabelled predictions censored at their age) and
    coverage by window age in days."""
    lo, hi = epoch_hour(start), epoch_hour(end)
    ensure_fresh(session, model, lo, hi, max_values)
    rows = load_totals(session, model, level="h", lo=lo, hi=hi, filters=(), now=now)
    delay_hist = Totals().counts("delays")
    ages: list[np.ndarray] = []
    by_age: dict[int, list[int]] = {}
    now_h = now.timestamp() / 3600
    for hour, acc in sorted(rows.items()):
        if acc.has("delays"):
            delay_hist = delay_hist + acc.counts("delays")
        n = int(acc["n_pred"])
        # implied negatives are not label arrivals: they stay censored at their age
        unlabelled = n - int(acc["n_labelled"] - acc["n_implied"])
        age_h = max(0.0, now_h - (hour + 0.5))
        if unlabelled > 0:
            ages.append(np.full(unlabelled, age_h))
        day = int(age_h // 24)
        agg = by_age.setdefault(day, [0, 0])
        agg[0] += n
        agg[1] += int(acc["n_labelled"])
    censored = np.concatenate(ages) if ages else np.zeros(0)
    arrival: dict[str, Any] = {}
    if model.kind == "binary":  # the curves come from the whole model's recent history
        arrival = curves_answer(model_curves(session, model, now), model)
    return {
        "unit": "hours",
        "quantiles": km_quantiles(delay_hist, censored),
        **arrival,
        "coverage_by_age": [
            {"age_days": d, "coverage": round(v[1] / v[0], 6), "predictions": v[0]}
            for d, v in sorted(by_age.items())
            if v[0]
        ],
        "start": start.isoformat().replace("+00:00", "Z"),
        "end": end.isoformat().replace("+00:00", "Z"),
    }
