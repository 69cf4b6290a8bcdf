"""Early warnings end to end on both stores: a drop rule with `early: true` raises an alert
on the projected recall of an unsettled day, marked early, and the settled day then either
confirms it or withdraws it (DESIGN.md, "Late labels" and "Rules and alerts").

Scenario (invented data, stated here; seeded): a returns model whose outcomes are due
within 7 days (`label_delay_days` 7, `negative_after_days` 7, `min_coverage` 0.9). Each day
has 300 actual positives and 900 negatives; a positive scores over the 0.5 threshold with
probability `recall`, a negative with probability 0.05. A positive's label (a return)
arrives after LogNormal(median 24 h, sigma 0.6); half of the negatives are confirmed as
kept after LogNormal(median 48 h, sigma 0.6), the other half are implied negatives after 7
days; every explicit delay is capped at 6.5 days. Days 0 to 12 have recall 0.85; day 13 is
the day looked at early. The rule: drop in recall, tolerance 0.05, alpha 0.05, min_support
50, a trailing baseline of 7 settled days.

The early look comes on day 15 at 12:00, when day 13's cohort is about two days old and some
40% of its expected labels are in (days 8 to 12 are looked at too: they are unsettled and
stable). Day 13 settles once its end is 7 days past, on day 21. In the second test the
misses of day 13 are reported first and its hits days later, so its early labels read a
recall far under the truth (arrival that depends on the score, which the projection does
not model): the early alert is a false one, and the settled day withdraws it.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import orjson
from sqlalchemy import select

from belated.alerts.evaluate import evaluate_rule
from belated.alerts.states import WITHDRAWN
from belated.alerts.tables import Delivery, Rule, RuleWindow
from belated.store.db import transaction
from belated.store.tables import ModelRow
from tests.conftest import Tenant
from tests.support import send

START = datetime(2026, 11, 1, tzinfo=UTC)
LOOK = START + timedelta(days=15, hours=12)  # day 13's early look
SETTLED = START + timedelta(days=21, hours=2)  # day 13 has settled
CAP_HOURS = 6.5 * 24
RULE = {
    "kind": "drop",
    "measure": "recall",
    "tolerance": 0.05,
    "alpha": 0.05,
    "min_support": 50,
    "baseline": {"windows": 7},
    "early": True,
}
Label = tuple[datetime, dict[str, Any]]  # when it is known, and its POST body


def _day(
    rng: np.random.Generator, d: int, recall: float, *, missed_first: bool = False
) -> tuple[list[dict[str, Any]], list[Label]]:
    """Predictions and labels of day `d`. `missed_first`: the positives scored under the
    threshold are reported within 2 hours, the flagged ones after LogNormal(median 5 days,
    sigma 0.3): the early labels then hold the misses and few of the hits."""
    day = START + timedelta(days=d)
    preds: list[dict[str, Any]] = []
    labels: list[Label] = []
    for i, positive in enumerate(np.r_[np.ones(300, bool), np.zeros(900, bool)]):
        ts = day + timedelta(seconds=int(rng.integers(0, 86_000)))
        hours: float | None
        if positive:
            hit = rng.random() < recall
            score = rng.uniform(0.5, 1) if hit else rng.uniform(0, 0.5)
            hours = 24 * np.exp(0.6 * rng.standard_normal())
            if missed_first:
                hours = 120 * np.exp(0.3 * rng.standard_normal()) if hit else 2.0
        else:
            score = rng.uniform(0.55, 1) if rng.random() < 0.05 else rng.uniform(0, 0.55)
            kept = rng.random() < 0.5
            hours = 48 * np.exp(0.6 * rng.standard_normal()) if kept else None
        pid = f"o-{d}-{i}"
        preds.append({"id": pid, "ts": ts.isoformat(), "score": float(score)})
        if hours is not None:
            at = ts + timedelta(hours=float(min(hours, CAP_HOURS)))
            labels.append((at, {"id": pid, "actual": int(positive), "ts": at.isoformat()}))
    return preds, labels


def _send_known(
    tenant: Tenant, labels: list[Label], after: datetime | None, upto: datetime
) -> None:
    """Send the labels known by `upto` (and not yet by `after`)."""
    due = [body for at, body in labels if at <= upto and (after is None or at > after)]
    send(tenant.client, "returns-v2", "labels", due)


def _evaluate(sessions: Any, rule_id: str, now: datetime) -> None:
    with transaction(sessions) as session:
        rule = session.get(Rule, rule_id)
        assert rule is not None
        evaluate_rule(session, rule, session.get(ModelRow, rule.model_id), now, 100)


def _events(sessions: Any, alert_id: str) -> list[dict[str, Any]]:
    """The outbox payloads of an alert's events, oldest first (what the webhook receives)."""
    with transaction(sessions) as session:
        rows = session.scalars(
            select(Delivery).where(Delivery.alert_id == alert_id).order_by(Delivery.id)
        ).all()
        return [orjson.loads(r.payload) for r in rows]


def _rows(sessions: Any, rule_id: str) -> dict[str, RuleWindow]:
    with transaction(sessions) as session:
        rows = session.scalars(select(RuleWindow).where(RuleWindow.rule_id == rule_id)).all()
        session.expunge_all()
        return {r.window_start.isoformat()[:10]: r for r in rows}


def _scenario(
    tenant: Tenant,
    sessions: Any,
    frozen: Any,
    seed: int,
    recall_13: float,
    missed_first: bool,
    look: datetime = LOOK,
) -> tuple[dict[str, Any], list[Label]]:
    """Model, rule, webhook and 14 days of predictions; the labels known at `look` sent;
    the early look made. Answers the rule and every label (to send the rest later)."""
    c = tenant.client
    body = {"name": "returns-v2", "label_delay_days": 7, "negative_after_days": 7}
    assert c.post("/v1/models", json={**body, "min_coverage": 0.9}).status_code == 201
    rule = c.post("/v1/models/returns-v2/rules", json=RULE)
    assert rule.status_code == 201, rule.text
    assert rule.json()["early"] is True
    hook = c.post("/v1/webhooks", json={"url": "http://127.0.0.1:9/hooks/belated"})
    assert hook.status_code == 201, hook.text
    rng = np.random.default_rng(seed)
    preds: list[dict[str, Any]] = []
    labels: list[Label] = []
    for d in range(14):
        p, lab = _day(rng, d, 0.85 if d < 13 else recall_13, missed_first=missed_first and d == 13)
        preds += p
        labels += lab
    frozen.set(look)
    send(c, "returns-v2", "predictions", preds)
    _send_known(tenant, labels, None, look)
    _evaluate(sessions, rule.json()["id"], look)
    return rule.json(), labels


def test_an_early_alert_is_confirmed_by_its_settled_window(
    tenant: Tenant, sessions: Any, frozen: Any
) -> None:
    c = tenant.client
    rule, labels = _scenario(tenant, sessions, frozen, 131, recall_13=0.60, missed_first=False)
    (alert,) = c.get("/v1/alerts").json()["items"]
    assert alert["state"] == "raised" and alert["early"] is True
    assert alert["started_at"] == "2026-11-14T00:00:00Z" and alert["confirmed_at"] is None
    assert alert["description"].endswith(": early warning from projected values.")
    (breach,) = alert["breaches"]
    assert breach["early"] is True and breach["breached"] is True and breach["p_value"] < 0.05
    assert breach["baseline"]["test"] == "projected-normal"
    assert breach["baseline"]["arrived_share"] >= 0.3 and breach["value"] < 0.7
    assert breach["recovered"] is None  # an early look never says recovered
    rows = _rows(sessions, rule["id"])
    assert rows["2026-11-14"].early and not rows["2026-11-14"].recovered
    assert all(rows[f"2026-11-{d:02d}"].early for d in range(9, 14))  # unsettled, stable
    assert not any(rows[f"2026-11-{d:02d}"].breached for d in range(9, 14))
    assert not any(rows[f"2026-11-{d:02d}"].early for d in range(2, 9))  # settled
    page = c.get("/models/returns-v2")
    assert page.status_code == 200 and 'class="chip prov"' in page.text
    assert f'data-alert="{alert["id"]}" data-state="raised" data-early' in page.text
    # a later look on the same day with more labels changes nothing: one early look a window
    later = LOOK + timedelta(hours=10)
    frozen.set(later)
    _send_known(tenant, labels, LOOK, later)
    _evaluate(sessions, rule["id"], later)
    again = _rows(sessions, rule["id"])["2026-11-14"]
    assert again.evaluated_at == rows["2026-11-14"].evaluated_at
    assert again.value == rows["2026-11-14"].value
    # day 13 settles and breaches: the alert is confirmed, no longer early
    frozen.set(SETTLED)
    _send_known(tenant, labels, later, SETTLED)
    _evaluate(sessions, rule["id"], SETTLED)
    (alert,) = c.get("/v1/alerts").json()["items"]
    assert alert["state"] == "raised" and alert["early"] is False
    assert alert["confirmed_at"] == "2026-11-22T02:00:00Z"
    assert "early warning" not in alert["description"]
    (breach,) = alert["breaches"]
    assert breach["early"] is False and breach["breached"] is True
    assert breach["baseline"]["test"] == "mid-p" and breach["value"] < 0.7
    events = _events(sessions, alert["id"])
    assert [e["type"] for e in events] == ["alert.raised", "alert.raised"]
    assert [e["data"]["early"] for e in events] == [True, False]
    assert events[1]["data"]["confirmed_at"] == "2026-11-22T02:00:00Z"
    assert "data-early" not in c.get("/models/returns-v2").text


def test_an_early_alert_the_settled_window_does_not_bear_out_is_withdrawn(
    tenant: Tenant, sessions: Any, frozen: Any
) -> None:
    c = tenant.client
    # a day later than the other look: with few hits reported yet, the positives expected
    # are few, so 30% of the day's expected labels (mostly negatives) takes three days
    look = LOOK + timedelta(days=1)
    rule, labels = _scenario(tenant, sessions, frozen, 132, 0.85, missed_first=True, look=look)
    (alert,) = c.get("/v1/alerts").json()["items"]
    assert alert["state"] == "raised" and alert["early"] is True
    (breach,) = alert["breaches"]
    assert breach["early"] is True and breach["value"] < 0.7
    frozen.set(SETTLED)
    _send_known(tenant, labels, look, SETTLED)
    _evaluate(sessions, rule["id"], SETTLED)
    (alert,) = c.get("/v1/alerts").json()["items"]
    assert alert["state"] == "cleared" and alert["cleared_reason"] == WITHDRAWN
    assert alert["cleared_at"] == "2026-11-22T02:00:00Z" and alert["early"] is True
    (window,) = alert["breaches"]  # kept with the alert, now the settled verdict
    assert window["early"] is False and window["breached"] is False
    assert window["value"] > 0.8 and window["baseline"]["test"] == "mid-p"
    events = _events(sessions, alert["id"])
    assert [e["type"] for e in events] == ["alert.raised", "alert.cleared"]
    assert events[1]["data"]["cleared_reason"] == WITHDRAWN
    assert c.get("/v1/alerts", params={"state": "raised,noted"}).json()["items"] == []
