"""The figures /metrics serves: computed by the jobs, kept in `service_state`.

For each model: the measures and the label coverage of its latest settled daily window (of
the last 30 days), that window's start, the drift of its latest closed daily window against
the model's reference (drift needs no labels), and the number of its raised or noted alerts.
The jobs keep one row per project, so that a scrape reads one small row and never runs
measures.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import timedelta
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.clock import now
from belated.metrics.drift import DRIFT_KEYS
from belated.metrics.params import Range
from belated.metrics.windows import MeasureOptions, windows_of_range
from belated.store.tables import ModelRow, ServiceState
from belated.timeutil import floor_window, parse_ts


def _key(project_id: int) -> str:
    return f"prom:{project_id}"


def latest(*, session: Session, model: ModelRow, max_values: int) -> dict[str, Any]:
    """A model's figures of its latest settled daily window (its name alone when none is)."""
    at = now()
    end = floor_window(at, "day") + timedelta(days=1)
    rng = Range("day", end - timedelta(days=30), end)
    windows = windows_of_range(session, model, rng, MeasureOptions(resamples=1), (), at, max_values)
    found = next((w for w in reversed(windows) if w["settled"] and w["predictions"]), None)
    figures: dict[str, Any] = {"name": model.name}
    if found is not None:
        figures["coverage"] = found["coverage"]
        figures["window_start"] = parse_ts(found["start"]).timestamp()
        figures["measures"] = {k: v.get("value") for k, v in found["measures"].items()}
    closed = next((w for w in reversed(windows) if w["closed"] and w["predictions"]), None)
    if closed is not None and closed.get("drift"):
        figures["drift"] = {k: closed["drift"].get(k) for k in DRIFT_KEYS}
        figures["drift_window_start"] = parse_ts(closed["start"]).timestamp()
    return figures


def cache(*, session: Session, max_values: int, open_alerts: Mapping[int, int]) -> int:
    """Compute and keep every project's model figures; answers the number of projects.

    `open_alerts` counts the raised or noted alerts by model id (none when absent).
    """
    by_project: dict[int, list[dict[str, Any]]] = {}
    for model in session.scalars(select(ModelRow).order_by(ModelRow.name)).all():
        figures = latest(session=session, model=model, max_values=max_values)
        figures["open_alerts"] = int(open_alerts.get(model.id, 0))
        by_project.setdefault(model.project_id, []).append(figures)
    for project_id, models in by_project.items():
        state = session.get(ServiceState, _key(project_id))
        value = {"models": models}
        if state is None:
            session.add(ServiceState(key=_key(project_id), value=value, updated_at=now()))
        else:
            state.value, state.updated_at = value, now()
    return len(by_project)


def cached(*, session: Session, project_id: int) -> dict[str, Any]:
    """The kept figures of a project (empty before the first job run)."""
    state = session.get(ServiceState, _key(project_id))
    return dict(state.value) if state is not None else {}
