"""Prometheus text exposition: the service's own counters, and cached model figures.

Model figures are computed by the jobs (the latest settled daily window of each model) and
cached in `service_state`; a scrape reads one small row per project, never runs measures.
Label values are model names and measure names only: bounded by the project's models.
"""

from __future__ import annotations

import math
from datetime import timedelta
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from belated.alerts.tables import Alert
from belated.clock import now
from belated.metrics.params import Range
from belated.metrics.windows import Options, build
from belated.store.db import transaction
from belated.store.tables import ModelRow, ServiceState
from belated.timeutil import floor_window, parse_ts

RATIOS = (
    "precision",
    "recall",
    "fbeta",
    "accuracy",
    "specificity",
    "npv",
    "balanced_accuracy",
    "positive_rate",
    "prevalence",
    "roc_auc",
    "average_precision",
)
OTHERS = {
    "mcc": "belated_model_mcc",
    "brier": "belated_model_brier_score",
    "log_loss": "belated_model_log_loss",
    "ece": "belated_model_calibration_error_ratio",
}


def _escape(value: str) -> str:
    return value.replace("\\", "\\\\").replace("\n", "\\n").replace('"', '\\"')


def _num(value: float) -> str:
    if math.isnan(value):
        return "NaN"
    if math.isinf(value):
        return "+Inf" if value > 0 else "-Inf"
    return repr(float(value))


class Exposition:
    """Accumulates metric families and renders them in the text format."""

    def __init__(self) -> None:
        self.lines: list[str] = []
        self.seen: set[str] = set()

    def family(self, name: str, kind: str, help_text: str) -> None:
        """Declare a metric family once."""
        if name not in self.seen:
            self.seen.add(name)
            self.lines.append(f"# HELP {name} {help_text}")
            self.lines.append(f"# TYPE {name} {kind}")

    def sample(self, name: str, value: float, labels: dict[str, str] | None = None) -> None:
        """One sample line."""
        text = ",".join(f'{k}="{_escape(v)}"' for k, v in (labels or {}).items())
        self.lines.append(f"{name}{{{text}}} {_num(value)}" if text else f"{name} {_num(value)}")

    def render(self) -> str:
        """The exposition text."""
        return "\n".join(self.lines) + "\n"


def service_metrics(out: Exposition, counters: dict[str, int], health: dict[str, Any]) -> None:
    """The service's own counters and health."""
    out.family(
        "belated_ingested_predictions_total", "counter", "Predictions accepted by this process."
    )
    out.sample("belated_ingested_predictions_total", counters.get("predictions", 0))
    out.family("belated_ingested_labels_total", "counter", "Labels received by this process.")
    out.sample("belated_ingested_labels_total", counters.get("labels", 0))
    out.family("belated_store_up", "gauge", "1 when the store answers.")
    out.sample("belated_store_up", 1 if health.get("store") == "up" else 0)
    out.family("belated_jobs_leader", "gauge", "1 when this process runs the scheduled jobs.")
    out.sample("belated_jobs_leader", 1 if health.get("jobs", {}).get("leader") else 0)
    for key, name, text in (
        (
            "refresh_lag_seconds",
            "belated_refresh_lag_seconds",
            "Age of the oldest dirty bucket mark (0 when all rollups are fresh).",
        ),
        ("dirty_buckets", "belated_dirty_buckets", "Hour buckets waiting for a refresh."),
        (
            "outbox_backlog",
            "belated_webhook_deliveries_pending",
            "Webhook deliveries not yet delivered.",
        ),
    ):
        if health.get(key) is not None:
            out.family(name, "gauge", text)
            out.sample(name, float(health[key]))


def model_metrics(out: Exposition, cached: dict[str, Any]) -> None:
    """Figures of one project's models, from the jobs' cache."""
    for m in cached.get("models", []):
        labels = {"model": m["name"]}
        for measure, value in m.get("measures", {}).items():
            if value is None:
                continue
            name = f"belated_model_{measure}_ratio" if measure in RATIOS else OTHERS.get(measure)
            if name is None:
                continue
            out.family(name, "gauge", f"{measure} of the latest settled daily window.")
            out.sample(name, value, labels)
        if m.get("coverage") is not None:
            out.family(
                "belated_model_label_coverage_ratio",
                "gauge",
                "Label coverage of the latest settled daily window.",
            )
            out.sample("belated_model_label_coverage_ratio", m["coverage"], labels)
        if m.get("window_start") is not None:
            out.family(
                "belated_model_window_start_timestamp_seconds",
                "gauge",
                "Start of the latest settled daily window.",
            )
            out.sample("belated_model_window_start_timestamp_seconds", m["window_start"], labels)
        out.family("belated_model_open_alerts", "gauge", "Raised or noted alerts.")
        out.sample("belated_model_open_alerts", m.get("open_alerts", 0), labels)


def cache_step(runner: Any) -> dict[str, Any]:
    """Compute and cache each project's model figures (a job step)."""
    projects = 0
    with transaction(runner.sessions) as session:
        by_project: dict[int, list[dict[str, Any]]] = {}
        for model in session.scalars(select(ModelRow).order_by(ModelRow.name)).all():
            by_project.setdefault(model.project_id, []).append(
                _model_figures(session, model, runner.settings.max_segment_values)
            )
        for project_id, models in by_project.items():
            key = f"prom:{project_id}"
            state = session.get(ServiceState, key)
            value = {"models": models}
            if state is None:
                session.add(ServiceState(key=key, value=value, updated_at=now()))
            else:
                state.value, state.updated_at = value, now()
            projects += 1
    return {"projects": projects}


def _model_figures(session: Session, model: ModelRow, max_values: int) -> dict[str, Any]:
    at = now()
    end = floor_window(at, "day") + timedelta(days=1)
    rng = Range("day", end - timedelta(days=30), end)
    windows = build(session, model, rng, Options(resamples=1), (), at, max_values)
    latest = next((w for w in reversed(windows) if w["settled"] and w["predictions"]), None)
    open_alerts = (
        session.scalar(
            select(func.count())
            .select_from(Alert)
            .where(Alert.model_id == model.id, Alert.state.in_(("raised", "noted")))
        )
        or 0
    )
    figures: dict[str, Any] = {"name": model.name, "open_alerts": int(open_alerts)}
    if latest is not None:
        figures["coverage"] = latest["coverage"]
        figures["window_start"] = parse_ts(latest["start"]).timestamp()
        figures["measures"] = {k: v.get("value") for k, v in latest["measures"].items()}
    return figures


def cached(session: Session, project_id: int) -> dict[str, Any]:
    """The cached figures of a project (empty before the first job run)."""
    state = session.get(ServiceState, f"prom:{project_id}")
    return dict(state.value) if state is not None else {}
