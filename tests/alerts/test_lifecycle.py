"""The alert lifecycle on a real store (SQLite and PostgreSQL): raise on the first breach,
collect later ones, keep notes, clear only after `clear_after` recovered windows, and deliver
nothing while the rule is muted. Evaluated windows are written as the evaluation job writes
them; the lifecycle is what moves on them (DESIGN.md, "Alerts")."""

from __future__ import annotations

import secrets
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

import orjson
import pytest
from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.alerts import lifecycle, rules, webhooks
from belated.alerts.tables import Alert, Delivery, Rule, RuleWindow
from belated.api.schemas import ModelCreate
from belated.store import keys, model_registry
from belated.store.db import transaction
from belated.store.tables import ModelRow

NOW = datetime(2026, 11, 15, 12, tzinfo=UTC)
DAY0 = datetime(2026, 11, 1, tzinfo=UTC)


@dataclass
class Setup:
    """One project with a model, a traffic rule on it and one webhook."""

    rule_id: str
    model_id: int
    hook_id: str


@pytest.fixture()
def setup(sessions: Any, frozen: Any) -> Setup:
    with transaction(sessions) as session:
        project = keys.get_or_create_project(session=session, name="t-" + secrets.token_hex(5))
        body = ModelCreate(name="returns-v2").model_dump()
        model = model_registry.create(session=session, project_id=project.id, fields=body)
        rule = rules.create_rule(
            session=session, model=model, fields={"kind": "traffic", "low": 1, "clear_after": 2}
        )
        hook = webhooks.create_webhook(
            session=session,
            project_id=project.id,
            url="http://127.0.0.1:9/hooks/belated",
            allow_private=True,
            own=("127.0.0.1", 1),
        )
        return Setup(rule.id, model.id, hook.id)


@pytest.fixture()
def run(sessions: Any, setup: Setup) -> Any:
    """Record one evaluated day and advance the lifecycle, in one transaction."""

    def step(
        day: int, breached: bool, now: datetime = NOW, recovered: bool | None = None
    ) -> str | None:
        with transaction(sessions) as session:
            rule, model = _rule_model(session, setup)
            start = DAY0 + timedelta(days=day)
            session.add(
                RuleWindow(
                    rule_id=rule.id,
                    segment="",
                    window_start=start,
                    window_end=start + timedelta(days=1),
                    breached=breached,
                    recovered=(not breached) if recovered is None else recovered,
                    value=0.0 if breached else 5.0,
                    evaluated_at=now,
                )
            )
            session.flush()
            return lifecycle.advance(session, rule, model, "", now, clear_after=2)

    return step


def _rule_model(session: Session, setup: Setup) -> tuple[Rule, ModelRow]:
    rule, model = session.get(Rule, setup.rule_id), session.get(ModelRow, setup.model_id)
    assert rule is not None and model is not None
    return rule, model


def _alerts(sessions: Any, setup: Setup) -> list[dict[str, Any]]:
    with transaction(sessions) as session:
        rows = session.scalars(
            select(Alert).where(Alert.rule_id == setup.rule_id).order_by(Alert.seq)
        ).all()
        return [lifecycle.alert_dict(session, a) for a in rows]


def _events(sessions: Any, setup: Setup) -> list[tuple[str, dict[str, Any]]]:
    with transaction(sessions) as session:
        rows = session.scalars(
            select(Delivery).where(Delivery.webhook_id == setup.hook_id).order_by(Delivery.id)
        ).all()
        return [(d.event_type, orjson.loads(d.payload)) for d in rows]


def _note(sessions: Any, alert_id: str, now: datetime, text: str = "looking into it") -> str:
    with transaction(sessions) as session:
        alert = session.get(Alert, alert_id)
        assert alert is not None
        return lifecycle.note(session, alert, text, "returns desk", now).state


def test_the_first_breach_raises_an_alert_and_writes_one_event(
    sessions: Any, setup: Setup, run: Any
) -> None:
    assert run(0, False) is None
    assert _alerts(sessions, setup) == []
    assert run(1, True) == "alert.raised"
    (alert,) = _alerts(sessions, setup)
    assert alert["state"] == "raised" and alert["segment"] is None
    assert alert["started_at"] == "2026-11-02T00:00:00Z"  # the breached window, not the run
    assert [b["window_start"] for b in alert["breaches"]] == ["2026-11-02T00:00:00Z"]
    ((kind, payload),) = _events(sessions, setup)
    assert kind == payload["type"] == "alert.raised"
    assert payload["data"]["id"] == alert["id"]


def test_later_breaches_join_the_alert_without_new_events(
    sessions: Any, setup: Setup, run: Any
) -> None:
    run(1, True)
    assert run(2, True) is None
    assert run(3, False) is None  # one clean window of the two clear_after asks for
    assert run(4, True) is None
    (alert,) = _alerts(sessions, setup)
    assert [b["window_start"][:10] for b in alert["breaches"]] == [
        "2026-11-02",
        "2026-11-03",
        "2026-11-05",
    ]
    assert [k for k, _ in _events(sessions, setup)] == ["alert.raised"]


def test_notes_are_kept_and_a_noted_alert_stays_active(
    sessions: Any, setup: Setup, run: Any
) -> None:
    run(1, True)
    (alert,) = _alerts(sessions, setup)
    assert _note(sessions, alert["id"], NOW) == "noted"
    later = NOW + timedelta(hours=1)
    assert _note(sessions, alert["id"], later, "supplier feed fixed") == "noted"
    assert run(2, True) is None  # joins the noted alert
    (alert,) = _alerts(sessions, setup)
    assert alert["state"] == "noted"
    assert alert["noted_at"] == "2026-11-15T12:00:00Z"  # the first note
    assert alert["notes"] == [
        {"text": "looking into it", "author": "returns desk", "at": "2026-11-15T12:00:00Z"},
        {"text": "supplier feed fixed", "author": "returns desk", "at": "2026-11-15T13:00:00Z"},
    ]
    assert len(alert["breaches"]) == 2
    events = _events(sessions, setup)
    assert [k for k, _ in events] == ["alert.raised", "alert.noted", "alert.noted"]
    assert [n["text"] for n in events[-1][1]["data"]["notes"]] == [
        "looking into it",
        "supplier feed fixed",
    ]


def test_clear_after_recovered_windows_clear_and_the_next_breach_raises_anew(
    sessions: Any, setup: Setup, run: Any
) -> None:
    run(1, True)
    (first,) = _alerts(sessions, setup)
    _note(sessions, first["id"], NOW)
    assert run(2, False) is None
    assert run(3, False) == "alert.cleared"
    assert _note(sessions, first["id"], NOW, "post-mortem filed") == "cleared"  # stays cleared
    assert run(4, False) is None  # nothing active, nothing to do
    assert run(5, True) == "alert.raised"
    old, new = _alerts(sessions, setup)
    assert (old["id"], old["state"], old["cleared_at"]) == (
        first["id"],
        "cleared",
        "2026-11-15T12:00:00Z",
    )
    assert [n["text"] for n in old["notes"]] == ["looking into it", "post-mortem filed"]
    assert new["id"] != old["id"] and new["state"] == "raised"
    assert [b["window_start"][:10] for b in new["breaches"]] == ["2026-11-06"]
    events = _events(sessions, setup)
    assert [(k, p["data"]["id"]) for k, p in events] == [
        ("alert.raised", old["id"]),
        ("alert.noted", old["id"]),
        ("alert.cleared", old["id"]),
        ("alert.noted", old["id"]),
        ("alert.raised", new["id"]),
    ]


def test_windows_that_are_merely_not_significant_do_not_clear(
    sessions: Any, setup: Setup, run: Any
) -> None:
    """Not breached is not recovered: only windows back within tolerance count."""
    run(1, True)
    assert run(2, False, recovered=False) is None
    assert run(3, False, recovered=False) is None
    assert run(4, False, recovered=False) is None
    (alert,) = _alerts(sessions, setup)
    assert alert["state"] == "raised"
    assert run(5, False) is None  # one recovered window of the two clear_after asks for
    assert run(6, False, recovered=False) is None  # the run of recovered windows breaks
    assert run(7, False) is None
    assert run(8, False) == "alert.cleared"


def test_a_muted_rule_records_and_moves_but_delivers_nothing(
    sessions: Any, setup: Setup, run: Any
) -> None:
    with transaction(sessions) as session:
        rule, _ = _rule_model(session, setup)
        rule.muted_until = NOW + timedelta(days=1)
    assert run(1, True) == "alert.raised"
    assert run(2, False) is None
    assert run(3, False) == "alert.cleared"
    (alert,) = _alerts(sessions, setup)
    assert alert["state"] == "cleared" and len(alert["breaches"]) == 1
    assert _events(sessions, setup) == []
    # once the mute has passed, the next alert is delivered again
    assert run(4, True, now=NOW + timedelta(days=2)) == "alert.raised"
    assert [k for k, _ in _events(sessions, setup)] == ["alert.raised"]
