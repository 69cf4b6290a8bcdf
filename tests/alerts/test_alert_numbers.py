"""Alert numbers: unique in their project, never reused, so paging the alert list by number
sees every alert exactly once.

The old numbering was count(*) + 1 over every project: after a rule was deleted with its
alert, the next alert took the number of one still stored, and a page of 1 ended the list
after the first of the two (seqs [2, 2]: one alert of two listed).
"""

from __future__ import annotations

import secrets
import threading
import time
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import Engine, text

from belated.alerts import numbers
from belated.jobs import JobRunner
from belated.store import keys
from belated.store.db import transaction
from tests.conftest import Tenant
from tests.support import send_both
from tests.support.alert_days import day_rows

START = datetime(2026, 11, 1, tzinfo=UTC)
# 300 orders a day; a traffic rule with low=500 breaches every evaluated day
THIN = {"kind": "traffic", "low": 500}


def _numbers(engine: Engine, project_id: int) -> dict[str, int]:
    with engine.connect() as conn:
        rows = conn.execute(
            text("SELECT id, seq FROM alerts WHERE project_id = :p"), {"p": project_id}
        ).all()
    return {alert_id: seq for alert_id, seq in rows}


def _evaluate(runner: JobRunner) -> None:
    """One run of the jobs (refresh, evaluation, delivery), in this thread."""
    summary = runner.tick()
    assert summary is not None and summary["evaluate"]["failed"] == 0, summary


def _open(tenant: Tenant, runner: JobRunner) -> str:
    """Add a traffic rule, evaluate, and return the id of the alert it opened."""
    rule = tenant.client.post("/v1/models/returns-v2/rules", json=THIN).json()
    _evaluate(runner)
    items = tenant.client.get("/v1/alerts", params={"limit": 100}).json()["items"]
    mine = [a["id"] for a in items if a["rule_id"] == rule["id"]]
    assert len(mine) == 1, items
    return mine[0]


def _pages(tenant: Tenant, limit: int) -> list[str]:
    """Every alert id the list gives, following the cursor page by page."""
    seen: list[str] = []
    cursor = None
    for _ in range(20):
        params: dict[str, Any] = {"limit": limit}
        if cursor:
            params["cursor"] = cursor
        page = tenant.client.get("/v1/alerts", params=params).json()
        seen += [a["id"] for a in page["items"]]
        cursor = page["next_cursor"]
        if cursor is None:
            return seen
    raise AssertionError("the cursor never ran out")


def test_a_retired_rule_keeps_its_alert_and_number_and_paging_sees_every_alert_once(
    tenant: Tenant, frozen: Any, runner: JobRunner, engine: Engine
) -> None:
    c = tenant.client
    body = {"name": "returns-v2", "label_delay_days": 2}
    assert c.post("/v1/models", json=body).status_code == 201
    rng = np.random.default_rng(3)
    for d in range(3):
        preds, labels = day_rows(
            rng, START + timedelta(days=d), positives=100, negatives=200, recall=0.8, prefix="o"
        )
        send_both(c, "returns-v2", preds, labels)
    try:
        first = _open(tenant, runner)
        second = _open(tenant, runner)
        kept = _numbers(engine, tenant.project_id)[first]
        rule_of_first = c.get(f"/v1/alerts/{first}").json()["rule_id"]
        assert c.delete(f"/v1/models/returns-v2/rules/{rule_of_first}").status_code == 204
        third = _open(tenant, runner)
    finally:
        runner.leader.release()
    seqs = _numbers(engine, tenant.project_id)
    assert set(seqs) == {first, second, third}  # retiring the rule kept its alert
    assert seqs[first] == kept
    assert len(set(seqs.values())) == 3
    assert seqs[third] > seqs[second] > seqs[first]
    old = c.get(f"/v1/alerts/{first}").json()
    assert old["rule"]["retired"] is True and old["rule"]["retired_at"]
    for limit in (1, 2, 100):
        listed = _pages(tenant, limit)
        assert sorted(listed) == sorted([first, second, third]), (limit, listed)
        assert listed[0] == third  # newest first


def test_concurrent_transactions_take_distinct_consecutive_numbers(sessions: Any) -> None:
    """Eight transactions of one project take a number at once and hold it a while before
    committing; each gets its own, and together they are 1..8."""
    with transaction(sessions) as session:
        project = keys.get_or_create_project(session=session, name="t-" + secrets.token_hex(5))
        project_id = project.id
    got: list[int] = []
    errors: list[BaseException] = []
    start = threading.Barrier(8)
    lock = threading.Lock()

    def take() -> None:
        try:
            start.wait(timeout=30)
            with transaction(sessions) as session:
                number = numbers.next_seq(session=session, project_id=project_id)
                time.sleep(0.05)  # the others try meanwhile
            with lock:
                got.append(number)
        except BaseException as exc:  # reported below
            errors.append(exc)

    threads = [threading.Thread(target=take) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert not errors, errors
    assert sorted(got) == list(range(1, 9))
    # a later transaction goes on from there
    with transaction(sessions) as session:
        assert numbers.next_seq(session=session, project_id=project_id) == 9
