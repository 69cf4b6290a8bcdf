"""POST /v1/alerts/{id}/note on both stores: who, what and when are kept; bad notes are
refused with problem details naming the field, and nothing is stored."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import pytest
from sqlalchemy import func, select

from belated.alerts.evaluate import evaluate_rule
from belated.alerts.schemas import NOTE_MAX
from belated.alerts.tables import AlertNote, Rule
from belated.client import BelatedError, Client
from belated.store import keys
from belated.store.db import transaction
from belated.store.tables import ModelRow
from tests.conftest import LiveServer, Tenant
from tests.support import send_both as send


@pytest.fixture()
def raised(tenant: Tenant, sessions: Any, frozen: Any) -> str:
    """A traffic rule no day meets on a model with two thin days: one raised alert."""
    c = tenant.client
    assert c.post("/v1/models", json={"name": "returns-v2"}).status_code == 201
    preds = [
        {"id": f"o-{d}-{i}", "ts": f"2026-11-1{d}T10:00:00Z", "score": 0.4}
        for d in range(2)
        for i in range(5)
    ]
    send(c, "returns-v2", preds, [])
    rule = c.post("/v1/models/returns-v2/rules", json={"kind": "traffic", "low": 100}).json()
    with transaction(sessions) as session:
        row = session.get(Rule, rule["id"])
        assert row is not None
        evaluate_rule(session, row, session.get(ModelRow, row.model_id), frozen.now(), 100)
    (alert,) = c.get("/v1/alerts").json()["items"]
    assert alert["state"] == "raised"
    return str(alert["id"])


def _notes(sessions: Any) -> int:
    with transaction(sessions) as session:
        return int(session.scalar(select(func.count()).select_from(AlertNote)) or 0)


@pytest.mark.parametrize(
    ("body", "field"),
    [
        ({"text": ""}, "text"),
        ({"text": "   \n\t"}, "text"),
        ({"text": "x" * (NOTE_MAX + 1)}, "text"),
        ({"text": "feed\x00fixed"}, "text"),
        ({}, "text"),
        ({"text": 5}, "text"),
        ({"text": "ok", "by": "someone"}, "by"),
    ],
)
def test_a_bad_note_is_refused_and_nothing_is_stored(
    tenant: Tenant, sessions: Any, raised: str, body: dict[str, Any], field: str
) -> None:
    before = _notes(sessions)
    r = tenant.client.post(f"/v1/alerts/{raised}/note", json=body)
    assert r.status_code == 422, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    assert field in r.json()["detail"] or any(field in str(e) for e in r.json()["errors"])
    assert _notes(sessions) == before
    assert tenant.client.get(f"/v1/alerts/{raised}").json()["state"] == "raised"


def test_a_note_records_who_what_and_when_and_marks_the_alert_noted(
    tenant: Tenant, sessions: Any, raised: str, frozen: Any
) -> None:
    with transaction(sessions) as session:
        _, token = keys.create(
            session=session, project_id=tenant.project_id, scopes=["admin"], name="returns desk"
        )
    r = tenant.client.post(
        f"/v1/alerts/{raised}/note",
        headers={"Authorization": f"Bearer {token}"},
        json={"text": "  the north warehouse feed stopped at 09:00  "},
    )
    assert r.status_code == 200, r.text
    got = r.json()
    assert got["state"] == "noted" and got["noted_at"] == "2026-11-15T12:00:00Z"
    assert got["notes"] == [
        {
            "text": "the north warehouse feed stopped at 09:00",
            "author": "returns desk",
            "at": "2026-11-15T12:00:00Z",
        }
    ]
    # a token without a name is named by its id
    r = tenant.client.post(f"/v1/alerts/{raised}/note", json={"text": "rerouted"})
    with transaction(sessions) as session:
        unnamed = keys.resolve(session=session, token=tenant.tokens["admin,ingest,read"])
        assert unnamed is not None
    assert [n["author"] for n in r.json()["notes"]] == ["returns desk", unnamed.token_id]
    assert [a["id"] for a in tenant.client.get("/v1/alerts?state=noted").json()["items"]] == [
        raised
    ]
    active = tenant.client.get("/v1/alerts?state=raised,noted").json()["items"]
    assert [a["id"] for a in active] == [raised]


def test_note_scopes_and_unknown_alerts(tenant: Tenant, raised: str) -> None:
    c = tenant.client
    r = c.post(f"/v1/alerts/{raised}/note", json={"text": "x"}, headers=tenant.headers("read"))
    assert r.status_code == 403
    assert c.post("/v1/alerts/alr_nope/note", json={"text": "x"}).status_code == 404
    # the old route is gone, not silently kept
    assert c.post(f"/v1/alerts/{raised}/acknowledge").status_code in (404, 405)


def test_the_client_lists_reads_and_notes_alerts(
    live: LiveServer, tenant: Tenant, raised: str
) -> None:
    with Client(live.url, tenant.tokens["admin,ingest,read"]) as c:
        assert [a["id"] for a in c.alerts(state="raised,noted")] == [raised]
        assert c.alerts(state="cleared") == []
        assert c.alerts(since=datetime(2026, 12, 1, tzinfo=UTC)) == []
        got = c.note(raised, "north feed back at 11:00")
        assert got["state"] == "noted" and got["notes"][0]["text"] == "north feed back at 11:00"
        one = c.alert(raised)
        assert one["kind"] == "traffic" and one["description"].startswith("Fewer than 100")
        with pytest.raises(BelatedError) as refused:
            c.note(raised, "")
        assert refused.value.status == 422
