"""The steps of one job run, in order: keep the day partitions ahead (PostgreSQL), sweep the
rows of deleted models that racing writes left (store/purge.py), refresh the rollups, drop
the settled raw days and the pending labels past their model's keep_raw_days, evaluate the
alert rules, send due webhook deliveries, keep the figures /metrics serves.

A step receives what the run provides (`StepContext`) and answers a small summary, which
the run records; a step that raises is logged and the next one still runs.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, Protocol

from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from belated.alerts import delivery, evaluate, lifecycle
from belated.alerts.tables import Rule
from belated.clock import now
from belated.config import Settings
from belated.metrics import figures
from belated.store import partitions, purge, raw_retention, refresh, retention, staleness
from belated.store.db import transaction
from belated.store.tables import ModelRow


class StepContext(Protocol):
    """What a step may use of the run: the sessions of the store and the settings."""

    @property
    def sessions(self) -> sessionmaker[Session]: ...

    @property
    def settings(self) -> Settings: ...


Step = Callable[[StepContext], dict[str, Any] | None]


def partitions_step(run: StepContext) -> dict[str, Any]:
    """PostgreSQL: day partitions ahead of time, and for rows that landed in the default."""
    with transaction(run.sessions) as session:
        return partitions.maintain(session, now())


def sweep_step(run: StepContext) -> dict[str, Any]:
    """Delete rows that writes racing a model's deletion committed after it (store/purge.py)."""
    return purge.sweep(run.sessions)


def refresh_step(run: StepContext) -> dict[str, Any]:
    """Join pending labels, mark crossed implied negatives, recompute dirty buckets."""
    started = now()
    marked = refresh.join_and_mark(run.sessions)
    done = refresh.refresh_all(run.sessions, max_values=run.settings.max_segment_values)
    # only once complete: a replica's staleness is counted from this start (store/staleness)
    staleness.record_refreshed(run.sessions, started=started)
    return {"marked": marked, "buckets": done}


def retention_step(run: StepContext) -> dict[str, Any]:
    """Drop raw days past each model's keep_raw_days once settled (after the refresh, whose
    marks they wait for); the rollups stay. One transaction per model."""
    with run.sessions() as session:
        ids = list(
            session.scalars(
                select(ModelRow.id).where(ModelRow.source == "http").order_by(ModelRow.id)
            )
        )
    totals = {"models": 0, "days": 0, "rows": 0, "failed": 0}
    for model_id in ids:
        try:
            with transaction(run.sessions) as session:
                model = session.get(ModelRow, model_id)
                if model is None:
                    continue
                got = raw_retention.drop_raw_days(session=session, model=model, now=now())
        except raw_retention.Raced as exc:
            raw_retention.log.info("%s; tried again next run", exc)
            continue
        except Exception:
            raw_retention.log.exception("dropping raw days of model %s failed", model_id)
            totals["failed"] += 1
            continue
        if got["rows"]:
            totals["models"] += 1
            totals["days"] += got["days"]
            totals["rows"] += got["rows"]
    return totals


def pending_step(run: StepContext) -> dict[str, Any]:
    """Drop pending labels that have waited longer than their model's keep_raw_days."""
    with transaction(run.sessions) as session:
        dropped = retention.drop_old_pending(session=session, now=now())
    return {"dropped": sum(dropped.values())}


def evaluate_step(run: StepContext) -> dict[str, Any]:
    """Evaluate every rule, each in its own transaction (one failing rule spares the rest)."""
    with run.sessions() as session:
        rule_ids = list(session.scalars(select(Rule.id).order_by(Rule.id)))
    totals = {"rules": 0, "windows": 0, "events": 0, "failed": 0}
    for rule_id in rule_ids:
        try:
            with transaction(run.sessions) as session:
                rule = session.get(Rule, rule_id)
                if rule is None:
                    continue
                model = session.get(ModelRow, rule.model_id)
                assert model is not None
                result = evaluate.evaluate_rule(
                    session, rule, model, now(), run.settings.max_segment_values
                )
            totals["rules"] += 1
            totals["windows"] += result["windows"]
            totals["events"] += result["events"]
        except Exception:
            evaluate.log.exception("evaluating rule %s failed", rule_id)
            totals["failed"] += 1
    return totals


def deliver_step(run: StepContext) -> dict[str, Any]:
    """Send due webhook deliveries."""
    return delivery.deliver_due(run.sessions, run.settings)


def cache_step(run: StepContext) -> dict[str, Any]:
    """Compute and keep each project's model figures for /metrics."""
    with transaction(run.sessions) as session:
        projects = figures.cache(
            session=session,
            max_values=run.settings.max_segment_values,
            open_alerts=lifecycle.open_counts(session),
        )
    return {"projects": projects}


# one declaration of the run: (name, step) in the order they run
STEPS: tuple[tuple[str, Step], ...] = (
    ("partitions", partitions_step),
    ("sweep", sweep_step),
    ("refresh", refresh_step),
    ("retention", retention_step),
    ("pending", pending_step),
    ("evaluate", evaluate_step),
    ("deliver", deliver_step),
    ("cache", cache_step),
)
