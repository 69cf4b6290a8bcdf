"""The alert steps the scheduler runs after each refresh."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select

from belated.alerts import delivery, evaluate
from belated.alerts.tables import Rule
from belated.clock import now
from belated.store.db import transaction
from belated.store.tables import ModelRow


def evaluate_step(runner: Any) -> dict[str, Any]:
    """Evaluate every rule, each in its own transaction (one failing rule spares the rest)."""
    with runner.sessions() as session:
        rule_ids = list(session.scalars(select(Rule.id).order_by(Rule.id)))
    totals = {"rules": 0, "windows": 0, "events": 0, "failed": 0}
    for rule_id in rule_ids:
        try:
            with transaction(runner.sessions) as session:
                rule = session.get(Rule, rule_id)
                if rule is None:
                    continue
                model = session.get(ModelRow, rule.model_id)
                assert model is not None
                result = evaluate.evaluate_rule(
                    session, rule, model, now(), runner.settings.max_segment_values
                )
            totals["rules"] += 1
            totals["windows"] += result["windows"]
            totals["events"] += result["events"]
        except Exception:
            evaluate.log.exception("evaluating rule %s failed", rule_id)
            totals["failed"] += 1
    return totals


def deliver_step(runner: Any) -> dict[str, Any]:
    """Send due webhook deliveries."""
    return delivery.deliver_due(runner.sessions, runner.settings)


def cache_step(runner: Any) -> dict[str, Any]:
    """Cache the figures /metrics serves."""
    from belated import prom

    return prom.cache_step(runner)


STEPS = [("evaluate", evaluate_step), ("deliver", deliver_step), ("cache", cache_step)]
