"""The early part of the alert lifecycle on a real store (SQLite and PostgreSQL): an alert
raised on early looks alone says `early`, a settled breach confirms it, and once none of its
breaches stands it is withdrawn. Evaluated windows are written as the evaluation job writes
them (an early look first; the settled decision replaces it in the same row)."""

from __future__ import annotations

import secrets
from datetime import UTC, datetime, timedelta
from typing import Any

import orjson
import pytest
from sqlalchemy import select

from belated.alerts import lifecycle, rules, webhooks
from belated.alerts.states import WITHDRAWN
from belated.alerts.tables import Alert, Delivery, Rule, RuleWindow
from belated.api.schemas import ModelCreate
from belated.store import keys, model_registry
from belated.store.db import transaction
from belated.store.tables import ModelRow

NOW = datetime(2026, 11, 20, 12, tzinfo=UTC)
DAY0 = datetime(2026, 11, 1, tzinfo=UTC)
RULE = {"kind": "drop", "measure": "recall", "early": True, "clear_after": 1}


@pytest.fixture()
def rule_id(sessions: Any, frozen: Any) -> str:
    with transaction(sessions) as session:
        project = keys.get_or_create_project(session=session, name="t-" + secrets.token_hex(5))
        body = ModelCreate(name="returns-v2").model_dump()
        model = model_registry.create(session=session, project_id=project.id, fields=body)
        rule = rules.create_rule(session=session, model=model, fields=RULE)
        webhooks.create_webhook(
            session=session,
            project_id=project.id,
            url="http://127.0.0.1:9/hooks/belated",
            allow_private=True,
            own=("127.0.0.1", 1),
        )
        return rule.id


@pytest.fixture()
def step(sessions: Any, rule_id: str) -> Any:
    """Record evaluated days {day: (breached, early)} (a day already recorded is decided
    again in its row, as the job does), then advance the lifecycle once."""

    def run(days: dict[int, tuple[bool, bool]], hours: int = 0) -> str | None:
        now = NOW + timedelta(hours=hours)
        with transaction(sessions) as session:
            rule = session.get(Rule, rule_id)
            assert rule is not None
            model = session.get(ModelRow, rule.model_id)
            assert model is not None
            for day, (breached, early) in days.items():
                start = DAY0 + timedelta(days=day)
                row = session.scalar(
                    select(RuleWindow).where(
                        RuleWindow.rule_id == rule_id, RuleWindow.window_start == start
                    )
                )
                if row is None:
                    row = RuleWindow(rule_id=rule_id, segment="", window_start=start)
                    session.add(row)
                row.window_end = start + timedelta(days=1)
                row.breached, row.early, row.evaluated_at = breached, early, now
                row.value = 0.6 if breached else 0.85
                row.recovered = None if early else not breached
            session.flush()
            return lifecycle.advance(session, rule, model, "", now, clear_after=1)

    return run


def _alerts(sessions: Any, rule_id: str) -> list[dict[str, Any]]:
    with transaction(sessions) as session:
        rows = session.scalars(
            select(Alert).where(Alert.rule_id == rule_id).order_by(Alert.seq)
        ).all()
        return [lifecycle.alert_dict(session, a) for a in rows]


def _events(sessions: Any, alert_id: str) -> list[dict[str, Any]]:
    with transaction(sessions) as session:
        rows = session.scalars(
            select(Delivery).where(Delivery.alert_id == alert_id).order_by(Delivery.id)
        ).all()
        return [orjson.loads(d.payload) for d in rows]


def test_breaches_on_early_looks_alone_raise_an_early_alert(
    sessions: Any, rule_id: str, step: Any
) -> None:
    assert step({5: (True, True), 6: (True, True)}) == "alert.raised"
    (alert,) = _alerts(sessions, rule_id)
    assert alert["early"] is True and alert["state"] == "raised"
    assert [b["early"] for b in alert["breaches"]] == [True, True]
    (event,) = _events(sessions, alert["id"])
    assert event["type"] == "alert.raised" and event["data"]["early"] is True


def test_with_a_settled_breach_among_them_the_alert_is_not_early(
    sessions: Any, rule_id: str, step: Any
) -> None:
    assert step({4: (True, False), 5: (True, True)}) == "alert.raised"
    (alert,) = _alerts(sessions, rule_id)
    assert alert["early"] is False and alert["confirmed_at"] is None


def test_a_settled_breach_of_a_later_window_confirms_the_early_alert(
    sessions: Any, rule_id: str, step: Any
) -> None:
    step({5: (True, True)})
    assert step({6: (True, False)}, hours=1) == "alert.raised"
    (alert,) = _alerts(sessions, rule_id)
    assert alert["early"] is False and alert["confirmed_at"] == "2026-11-20T13:00:00Z"
    assert [e["data"]["early"] for e in _events(sessions, alert["id"])] == [True, False]
    # confirmed: from now on an ordinary alert, that clears on recovery
    assert step({5: (False, False)}, hours=2) is None  # day 6 still breaches
    assert step({7: (False, False)}, hours=3) == "alert.cleared"
    (alert,) = _alerts(sessions, rule_id)
    assert alert["cleared_reason"].startswith("recovered")


def test_an_early_alert_is_held_while_any_of_its_breaches_stands_then_withdrawn(
    sessions: Any, rule_id: str, step: Any
) -> None:
    step({5: (True, True)})
    assert step({6: (True, True)}, hours=1) is None  # joins, no event
    assert step({5: (False, False)}, hours=2) is None  # day 5 settled clean; day 6 holds it
    (alert,) = _alerts(sessions, rule_id)
    assert alert["state"] == "raised" and alert["early"] is True
    # recovered settled windows do not clear an early alert: it waits for its own windows
    assert step({7: (False, False), 8: (False, False)}, hours=3) is None
    assert _alerts(sessions, rule_id)[0]["state"] == "raised"
    assert step({6: (False, False)}, hours=4) == "alert.cleared"
    (alert,) = _alerts(sessions, rule_id)
    assert alert["state"] == "cleared" and alert["cleared_reason"] == WITHDRAWN
    assert alert["cleared_at"] == "2026-11-20T16:00:00Z"
    # its windows stay with it, as the settled verdicts that withdrew it
    assert [(b["breached"], b["early"]) for b in alert["breaches"]] == [(False, False)] * 2
    assert alert["first_window"]["start"] == "2026-11-06T00:00:00Z"
    events = _events(sessions, alert["id"])
    assert [e["type"] for e in events] == ["alert.raised", "alert.cleared"]
    assert events[1]["data"]["cleared_reason"] == WITHDRAWN
    # a later breach raises a new alert
    assert step({9: (True, True)}, hours=5) == "alert.raised"
    assert [a["state"] for a in _alerts(sessions, rule_id)] == ["cleared", "raised"]


def test_a_noted_early_alert_is_confirmed_and_stays_noted(
    sessions: Any, rule_id: str, step: Any
) -> None:
    step({5: (True, True)})
    (alert,) = _alerts(sessions, rule_id)
    with transaction(sessions) as session:
        row = session.get(Alert, alert["id"])
        assert row is not None
        lifecycle.note(session, row, "projected only, watching", "returns desk", NOW)
    assert step({5: (True, False)}, hours=1) == "alert.raised"  # the same day, settled
    (alert,) = _alerts(sessions, rule_id)
    assert alert["state"] == "noted" and alert["early"] is False and alert["confirmed_at"]
