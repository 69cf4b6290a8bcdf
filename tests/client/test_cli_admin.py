"""`belated models|rules|alerts|keys|markers ...` against the service on loopback: each command
does what the API does, prints a table, CSV or JSON, and a refusal is one line."""

from __future__ import annotations

import csv
import io
import json
from datetime import UTC, datetime, timedelta
from typing import Any

from click.testing import Result
from sqlalchemy import Engine

from belated.alerts.evaluate import evaluate_rule
from belated.alerts.tables import Rule
from belated.clock import clock
from belated.store.db import transaction
from belated.store.tables import ModelRow
from tests.client import invoke
from tests.client.test_cli_windows import table_rows
from tests.conftest import LiveServer, Tenant
from tests.support import (
    base_time,
    create_model,
    predictions,
    rows,
    send_both,
    stamp,
    unique_name,
)

ALL = "admin,ingest,read"


def ok(result: Result) -> str:
    """The output of a command that must have succeeded."""
    assert result.exit_code == 0, (result.output, result.exception)
    return result.output


def refused(result: Result, *words: str) -> str:
    """The one line a refused command prints; it names `words`."""
    assert result.exit_code == 1, result.output
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1, result.output
    assert "Traceback" not in result.output
    assert all(w in lines[0] for w in words), lines[0]
    return lines[0]


def test_models_list_show_create_update_delete(live: LiveServer, tenant: Tenant) -> None:
    admin, read = tenant.tokens[ALL], tenant.tokens["read"]
    name = unique_name()
    made = json.loads(
        ok(
            invoke(
                "models",
                "create",
                name,
                "--set",
                "threshold=0.3",
                "--set",
                'segment_keys=["region"]',
                "--format",
                "json",
                url=live.url,
                token=admin,
            )
        )
    )
    assert made["name"] == name and made["threshold"] == 0.3 and made["segment_keys"] == ["region"]
    listed = json.loads(ok(invoke("models", "list", "--format", "json", url=live.url, token=read)))
    assert [m["name"] for m in listed] == [name]
    table = table_rows(ok(invoke("models", "list", url=live.url, token=read)))
    assert table[0][:3] == ["name", "kind", "threshold"] and table[1][:3] == [name, "binary", "0.3"]
    sheet = list(
        csv.DictReader(
            io.StringIO(ok(invoke("models", "list", "--format", "csv", url=live.url, token=read)))
        )
    )
    assert sheet[0]["name"] == name and sheet[0]["segment_keys"] == "region"
    assert sheet[0]["predictions"] == "0"
    shown = ok(invoke("models", "show", name, url=live.url, token=read))
    assert any(line.split() == ["name", name] for line in shown.splitlines())
    assert any(line.split() == ["threshold", "0.3"] for line in shown.splitlines())
    changed = json.loads(
        ok(
            invoke(
                "models",
                "update",
                name,
                "--set",
                "threshold=0.45",
                "--format",
                "json",
                url=live.url,
                token=admin,
            )
        )
    )
    assert changed["threshold"] == 0.45
    assert tenant.client.get(f"/v1/models/{name}").json()["threshold"] == 0.45
    # refusals are one line with the problem's detail, and change nothing
    refused(
        invoke("models", "update", name, "--set", "threshold=7", url=live.url, token=admin),
        "refused: 422",
        "threshold",
    )
    refused(invoke("models", "create", name, url=live.url, token=admin), "refused: 409")
    refused(invoke("models", "delete", name, "--yes", url=live.url, token=read), "refused: 403")
    assert tenant.client.get(f"/v1/models/{name}").json()["threshold"] == 0.45
    assert "deleted" in ok(invoke("models", "delete", name, "--yes", url=live.url, token=admin))
    refused(invoke("models", "show", name, url=live.url, token=read), "refused: 404", name)


def test_rules_list_create_delete(live: LiveServer, tenant: Tenant, engine: Engine) -> None:
    admin = tenant.tokens[ALL]
    model = create_model(tenant, engine, segment_keys=["region", "channel"])
    out = ok(
        invoke(
            "rules",
            "create",
            "--model",
            model.name,
            "--kind",
            "drop",
            "--measure",
            "recall",
            "--segment-by",
            "region",
            "--set",
            "tolerance=0.05",
            "--format",
            "json",
            url=live.url,
            token=admin,
        )
    )
    rule = json.loads(out)
    assert rule["segment_by"] == "region" and rule["tolerance"] == 0.05
    typo = invoke(
        "rules",
        "create",
        "--model",
        model.name,
        "--kind",
        "traffic",
        "--set",
        "low=5",
        "--segment-by",
        "regoin",
        url=live.url,
        token=admin,
    )
    refused(typo, "refused: 422", "regoin", "region")
    pct = invoke(
        "rules",
        "create",
        "--model",
        model.name,
        "--kind",
        "floor",
        "--measure",
        "precision",
        "--threshold",
        "70",
        url=live.url,
        token=admin,
    )
    refused(pct, "refused: 422", "0.7")
    count = "SELECT count(*) FROM rules WHERE model_id = :m"
    assert rows(engine, count, m=model.id)[0][0] == 1
    body = table_rows(ok(invoke("rules", "list", "--model", model.name, url=live.url, token=admin)))
    assert body[0][:3] == ["id", "kind", "measure"] and body[1][:3] == [
        rule["id"],
        "drop",
        "recall",
    ]
    assert "retired" in ok(
        invoke("rules", "delete", rule["id"], "--model", model.name, url=live.url, token=admin)
    )
    left = json.loads(
        ok(
            invoke(
                "rules",
                "list",
                "--model",
                model.name,
                "--format",
                "json",
                url=live.url,
                token=admin,
            )
        )
    )
    assert left == []
    both = json.loads(
        ok(
            invoke(
                "rules",
                "list",
                "--model",
                model.name,
                "--retired",
                "--format",
                "json",
                url=live.url,
                token=admin,
            )
        )
    )
    assert [r["id"] for r in both] == [rule["id"]] and both[0]["retired_at"]


def test_alerts_list_and_note(live: LiveServer, tenant: Tenant, sessions: Any) -> None:
    clock.set(datetime(2026, 11, 15, 12, tzinfo=UTC))
    c, admin = tenant.client, tenant.tokens[ALL]
    assert c.post("/v1/models", json={"name": "returns-v2"}).status_code == 201
    preds = [
        {"id": f"o-{d}-{i}", "ts": f"2026-11-1{d}T10:00:00Z", "score": 0.4}
        for d in range(2)
        for i in range(5)
    ]
    send_both(c, "returns-v2", preds, [])
    rule = c.post("/v1/models/returns-v2/rules", json={"kind": "traffic", "low": 100}).json()
    with transaction(sessions) as session:
        row = session.get(Rule, rule["id"])
        assert row is not None
        evaluate_rule(session, row, session.get(ModelRow, row.model_id), clock.now(), 100)
    listed = json.loads(
        ok(
            invoke(
                "alerts",
                "list",
                "--state",
                "raised",
                "--format",
                "json",
                url=live.url,
                token=tenant.tokens["read"],
            )
        )
    )
    assert [a["rule_id"] for a in listed] == [rule["id"]]
    alert = listed[0]["id"]
    body = table_rows(ok(invoke("alerts", "list", url=live.url, token=tenant.tokens["read"])))
    assert body[1][:4] == [alert, "raised", "returns-v2", "traffic"]
    out = ok(invoke("alerts", "note", alert, "the feed was paused", url=live.url, token=admin))
    assert out.strip() == f"{alert}: noted, 1 notes"
    got = c.get(f"/v1/alerts/{alert}").json()
    assert got["state"] == "noted" and got["notes"][0]["text"] == "the feed was paused"
    refused(invoke("alerts", "note", "alr_nope", "x", url=live.url, token=admin), "refused: 404")
    refused(invoke("alerts", "note", alert, "   ", url=live.url, token=admin), "refused: 422")
    assert len(c.get(f"/v1/alerts/{alert}").json()["notes"]) == 1
    empty = invoke(
        "alerts", "list", "--state", "cleared", "--format", "json", url=live.url, token=admin
    )
    assert json.loads(ok(empty)) == []


def test_keys_list_create_revoke(live: LiveServer, tenant: Tenant, store_url: str) -> None:
    admin = tenant.tokens["admin"]
    made = ok(
        invoke(
            "keys", "create", "--scopes", "read", "--name", "dashboards", url=live.url, token=admin
        )
    )
    secret = made.splitlines()[-1]
    key_id = made.splitlines()[0].removeprefix("key id: ")
    assert (
        tenant.client.get("/v1/models", headers={"Authorization": f"Bearer {secret}"}).status_code
        == 200
    )
    listed = json.loads(ok(invoke("keys", "list", "--format", "json", url=live.url, token=admin)))
    mine = [k for k in listed if k["id"] == key_id]
    assert mine and mine[0]["name"] == "dashboards" and mine[0]["scopes"] == ["read"]
    assert all("token" not in k and secret not in json.dumps(k) for k in listed)
    assert len(listed) == len(tenant.tokens) + 1
    assert "revoked" in ok(invoke("keys", "revoke", key_id, url=live.url, token=admin))
    assert (
        tenant.client.get("/v1/models", headers={"Authorization": f"Bearer {secret}"}).status_code
        == 401
    )
    refused(invoke("keys", "revoke", key_id, url=live.url, token=admin), "refused: 404")
    table = table_rows(ok(invoke("keys", "list", "--revoked", url=live.url, token=admin)))
    assert any(r[0] == key_id and r[4] != "-" for r in table[1:])
    refused(invoke("keys", "list", url=live.url, token=tenant.tokens["read"]), "refused: 403")
    # neither a project nor an address: a usage error that says what to give
    lost = invoke("keys", "create", "--scopes", "read")
    assert lost.exit_code == 2 and "--project" in lost.output and "--url" in lost.output
    # on the store directly: a project that does not exist yet is created, and said so
    project = unique_name("shop")
    first = ok(invoke("keys", "create", "--project", project, "--database-url", store_url))
    assert "created" in first.splitlines()[0] and project in first.splitlines()[0]
    second = ok(invoke("keys", "create", "--project", project, "--database-url", store_url))
    assert second.splitlines()[0] == f"project: {project}"


def test_markers_add_list_delete(live: LiveServer, tenant: Tenant, engine: Engine) -> None:
    admin, read = tenant.tokens[ALL], tenant.tokens["read"]
    model = create_model(tenant, engine)
    out = ok(
        invoke(
            "markers",
            "add",
            "--model",
            model.name,
            "--at",
            "2026-10-01T08:00:00Z",
            "supplier change in the north",
            url=live.url,
            token=admin,
        )
    )
    marker_id = out.split(":")[0]
    assert out.strip() == f"{marker_id}: 2026-10-01T08:00:00Z supplier change in the north"
    listed = json.loads(
        ok(
            invoke(
                "markers",
                "list",
                "--model",
                model.name,
                "--format",
                "json",
                url=live.url,
                token=read,
            )
        )
    )
    assert [(m["id"], m["text"]) for m in listed] == [(marker_id, "supplier change in the north")]
    body = table_rows(
        ok(invoke("markers", "list", "--model", model.name, url=live.url, token=read))
    )
    assert body[0] == ["id", "at", "text", "who", "created_at"] and body[1][0] == marker_id
    refused(
        invoke(
            "markers", "add", "--model", model.name, "--at", "soon", "x", url=live.url, token=admin
        ),
        "refused: 422",
        "at",
    )
    refused(
        invoke(
            "markers",
            "add",
            "--model",
            model.name,
            "--at",
            "2026-10-01",
            "x" * 501,
            url=live.url,
            token=admin,
        ),
        "refused: 422",
        "text",
    )
    count = "SELECT count(*) FROM markers WHERE model_id = :m"
    assert rows(engine, count, m=model.id)[0][0] == 1
    ok(invoke("markers", "delete", marker_id, "--model", model.name, url=live.url, token=admin))
    assert rows(engine, count, m=model.id)[0][0] == 0


def test_windows_checks_tags_and_measures_and_prints_csv_and_json(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    batch = [
        {**p, "tags": {"region": ("north", "south")[i % 2]}} for i, p in enumerate(predictions(40))
    ]
    send_both(tenant.client, model.name, batch, [])
    read = tenant.tokens["read"]
    refused(
        invoke("windows", "--model", model.name, "--tag", "region=nrth", url=live.url, token=read),
        "refused: 422",
        "nrth",
        "north",
    )
    refused(
        invoke("windows", "--model", model.name, "--tag", "regoin=north", url=live.url, token=read),
        "refused: 422",
        "regoin",
        "region",
    )
    bad = invoke(
        "windows",
        "--model",
        model.name,
        "--measures",
        "estimated_precision",
        url=live.url,
        token=read,
    )
    assert bad.exit_code == 2 and "Traceback" not in bad.output
    assert [line for line in bad.output.splitlines() if line.strip()] == [
        bad.output.strip()
    ] and "unknown measure 'estimated_precision'" in bad.output
    usage = invoke("windows", "--model", model.name, "--tag", "north", url=live.url, token=read)
    assert usage.exit_code == 2 and "KEY=VALUE" in usage.output
    first = tenant.client.get(
        f"/v1/models/{model.name}/metrics",
        params={"granularity": "week", "tag.region": "north"},
    ).json()
    assert sum(w["predictions"] for w in first["windows"]) == 20
    answer = json.loads(
        ok(
            invoke(
                "windows",
                "--model",
                model.name,
                "--tag",
                "region=north",
                "--granularity",
                "week",
                "--beta",
                "2",
                "--format",
                "json",
                url=live.url,
                token=read,
            )
        )
    )
    assert answer["tags"] == {"region": "north"} and answer["beta"] == 2
    assert sum(w["predictions"] for w in answer["windows"]) == 20
    sheet = list(
        csv.DictReader(
            io.StringIO(
                ok(
                    invoke(
                        "windows",
                        "--model",
                        model.name,
                        "--granularity",
                        "week",
                        "--format",
                        "csv",
                        "--measures",
                        "precision",
                        "--start",
                        stamp(base_time() - timedelta(days=15)),
                        "--end",
                        stamp(base_time() + timedelta(days=8)),
                        url=live.url,
                        token=read,
                    )
                )
            )
        )
    )
    assert sum(int(r["predictions"]) for r in sheet) == 40
    assert {"start", "coverage", "precision", "precision_low", "precision_high"} <= set(sheet[0])
    assert "recall" not in sheet[0]
