"""A settled window whose labels are corrected is decided again, and says so.

Scenario (stated distributions, tests/support/alert_days.py): each day has 300 actual
positives and 900 negatives, all labelled 6 hours after the prediction; a positive scores
over the 0.5 threshold with probability 0.85. A recall drop rule on a 7-day trailing baseline
decides day 8 once it has settled (label delay 2 days). Then 120 of day 8's caught
positives are corrected to negatives (the returns were refused as damage claims, say): day
8's recall falls from about 0.85 to about 0.75, and the next evaluation decides the same
window again. Its row, and the alert it raises, keep when that happened and what the first
decision was.
"""

from __future__ import annotations

from datetime import timedelta
from typing import Any

import numpy as np
from sqlalchemy import select

from belated.alerts.evaluate import evaluate_rule
from belated.alerts.tables import Rule, RuleWindow
from belated.store.db import transaction
from belated.store.tables import ModelRow
from belated.timeutil import from_db
from tests.conftest import Tenant
from tests.support import send_both
from tests.support.alert_days import DROP_RULE, START, day_rows, returns_model


def _evaluate(sessions: Any, rule_id: str, now: Any) -> None:
    with transaction(sessions) as session:
        rule = session.get(Rule, rule_id)
        assert rule is not None
        evaluate_rule(session, rule, session.get(ModelRow, rule.model_id), now, 100)


def _day8(sessions: Any, rule_id: str) -> RuleWindow:
    with transaction(sessions) as session:
        row = session.scalars(
            select(RuleWindow).where(
                RuleWindow.rule_id == rule_id,
                RuleWindow.window_start == START + timedelta(days=8),
            )
        ).one()
        session.expunge(row)
        return row


def test_a_corrected_settled_window_is_decided_again_and_says_so(
    tenant: Tenant, sessions: Any, frozen: Any
) -> None:
    c = tenant.client
    returns_model(c)
    rule = c.post("/v1/models/returns-v2/rules", json=DROP_RULE).json()
    rng = np.random.default_rng(8)
    day8_labels: list[dict[str, Any]] = []
    day8_scores: dict[str, float] = {}
    for d in range(9):
        preds, labels = day_rows(
            rng, START + timedelta(days=d), positives=300, negatives=900, recall=0.85, prefix="o"
        )
        send_both(c, "returns-v2", preds, labels)
        if d == 8:
            day8_labels = labels
            day8_scores = {p["id"]: p["score"] for p in preds}
    first_look = START + timedelta(days=10, hours=12)
    frozen.set(first_look)
    _evaluate(sessions, rule["id"], first_look)
    before = _day8(sessions, rule["id"])
    assert before.breached is False and before.decided_again_at is None
    assert before.previous is None

    caught = [x for x in day8_labels if x["actual"] == 1 and day8_scores[x["id"]] >= 0.5]
    corrected = [{**x, "actual": 0} for x in caught[:120]]
    answer = c.post("/v1/models/returns-v2/labels", json={"labels": corrected}).json()
    assert answer["corrected"] == 120
    again = first_look + timedelta(hours=6)
    frozen.set(again)
    _evaluate(sessions, rule["id"], again)
    after = _day8(sessions, rule["id"])
    assert from_db(after.decided_again_at) == again
    assert after.previous is not None
    assert after.previous["breached"] is False
    assert after.previous["value"] == before.value
    assert after.value is not None and before.value is not None
    assert after.value < before.value - 0.05  # recall fell by the corrections
    assert after.breached is True
    (alert,) = c.get("/v1/alerts").json()["items"]
    (breach,) = [b for b in alert["breaches"] if b["window_start"] == "2026-11-09T00:00:00Z"]
    assert breach["decided_again_at"] == "2026-11-11T18:00:00Z"
    assert breach["previous"]["value"] == before.value
