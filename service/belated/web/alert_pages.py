"""The alerts as the dashboard shows them: every page of them, their rules in a sentence,
and the alerts page."""

from __future__ import annotations

from typing import Any

from sqlalchemy.orm import Session

from belated.alerts import records as alert_records
from belated.alerts import rules as alert_rules
from belated.store import model_registry
from belated.store.keys import Principal
from belated.store.tables import ModelRow
from belated.web.names import name_of

QUIET = ("start", "end", "windows", "fixed", "frozen")  # said once, in the alert's sentence
ACTIVE = "raised,noted"  # the alert states that stay in sight until an alert clears
PAGE = 500


def list_all(
    session: Session, who: Principal, *, state: str | None, model: str | None
) -> list[dict[str, Any]]:
    """Every alert that matches, newest first (all pages)."""
    out: list[dict[str, Any]] = []
    after: int | None = None
    while True:
        items, after = alert_records.list_alerts(
            session=session,
            project_id=who.project_id,
            state=state,
            model=model,
            since=None,
            after=after,
            limit=PAGE,
        )
        out += items
        if after is None:
            return out


def describe_rule(rule: Any) -> str:
    """One plain sentence for a rule."""
    m = name_of(rule.measure) if rule.measure else ""
    text = {
        "floor": f"{m} under {rule.threshold}"
        + (" (upper interval end)" if rule.mode == "confident" else ""),
        "drop": f"{m} more than {rule.tolerance} under its baseline at α = {rule.alpha}",
        "shift": f"{m} moved by at least {rule.threshold} from its baseline",
        "traffic": f"predictions outside [{rule.low}, {rule.high}]",
        "stall": (
            f"coverage of old windows under {rule.threshold}"
            if rule.threshold is not None
            else f"no label for {rule.max_silence_hours} h"
        ),
    }.get(rule.kind, rule.kind)
    seg = f", per {rule.segment_by}" if rule.segment_by else ""
    return f"{text} (per {rule.granularity}{seg})"


MEASURED = ("value", "drop", "change")  # measured on the data: always three decimals


def _figure(key: str, value: float) -> str:
    """A measured value with three decimals, so that a column of them lines up (0.100 beside
    0.812); a count whole, with thousands separators; a setting as it was written (0.05)."""
    if key in MEASURED:
        return f"{value:.3f}"
    if isinstance(value, int) or float(value).is_integer():
        return f"{int(value):,}"
    return f"{value:.3f}".rstrip("0").rstrip(".")


def baseline_text(baseline: dict[str, Any] | None) -> str:
    """What a breach was compared with, in a few words (the period is in the sentence)."""
    parts = []
    for key, value in (baseline or {}).items():
        if key in QUIET:
            continue
        if isinstance(value, dict):
            parts.append(f"{key.replace('_', ' ')}: {len(value)} values")
        elif isinstance(value, int | float) and not isinstance(value, bool):
            parts.append(f"{key.replace('_', ' ')} {_figure(key, value)}")
        elif value is not None:
            parts.append(f"{key.replace('_', ' ')} {value}")
    return "; ".join(parts) or "—"


def with_rules(
    session: Session, row: ModelRow, alerts: list[dict[str, Any]]
) -> list[dict[str, Any]]:
    """Name the rule of each alert of a model (retired rules included) as `rule_text`."""
    rules = {
        r.id: describe_rule(alert_rules.rule_read(r, row.name))
        for r in alert_rules.list_rules(session=session, model=row, retired=True)
    }
    for a in alerts:
        a["rule_text"] = rules.get(a["rule_id"], a["rule_id"])
    return alerts


def all_alerts(
    *, session: Session, who: Principal, state: str | None, model: str | None
) -> list[dict[str, Any]]:
    """Every matching alert of the project, newest first, each with its rule named."""
    items = list_all(session, who, state=state or None, model=model or None)
    for name in sorted({a["model"] for a in items}):
        row = model_registry.get(session=session, project_id=who.project_id, name=name)
        with_rules(session, row, [a for a in items if a["model"] == name])
    return items


def alerts_view(
    *, session: Session, who: Principal, state: str | None, model: str | None, after: int | None
) -> dict[str, Any]:
    """A page of the project's alerts, newest first, each with its rule and breaches."""
    items, more = alert_records.list_alerts(
        session=session,
        project_id=who.project_id,
        state=state or None,
        model=model or None,
        since=None,
        after=after,
        limit=50,
    )
    for name in sorted({a["model"] for a in items}):
        row = model_registry.get(session=session, project_id=who.project_id, name=name)
        with_rules(session, row, [a for a in items if a["model"] == name])
    for a in items:
        a["breaches"] = [
            {**b, "baseline_text": baseline_text(b["baseline"])} for b in a["breaches"][::-1]
        ]
    return {"alerts": items, "state": state or "", "model": model or "", "next": more}
