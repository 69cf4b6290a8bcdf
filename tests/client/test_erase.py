"""Erasure by id from the client (`Client.erase`) and the command line (`belated erase`),
against the service on loopback: the rows are gone from the store, the answer counts them,
the ids of which nothing was stored are named, and a read token is refused."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from sqlalchemy import Engine

from belated.client import BelatedError, Client
from tests.client import invoke
from tests.conftest import LiveServer, Tenant
from tests.support import count, create_model, label, predictions, send


def _filled(tenant: Tenant, engine: Engine, n: int) -> tuple[str, int, list[str]]:
    model = create_model(tenant, engine)
    items = predictions(n)
    send(tenant.client, model.name, "predictions", items)
    send(tenant.client, model.name, "labels", [label(p["id"], "1") for p in items[::2]])
    return model.name, model.id, [p["id"] for p in items]


def test_the_client_erases_in_batches_and_sums_the_answers(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    name, mid, ids = _filled(tenant, engine, 12)
    with Client(live.url, tenant.tokens["admin,ingest,read"]) as c:
        answer = c.erase(name, [*ids[:7], "nobody"], batch_size=3)
        assert answer == {
            "erased": {"predictions": 7, "labels": 4, "pending_labels": 0},
            "not_found": ["nobody"],
            "expired": [],
        }
        assert c.model(name)["counts"]["predictions"] == 5
    assert count(engine, "predictions", mid) == 5
    assert count(engine, "labels", mid) == 2
    with Client(live.url, tenant.tokens["ingest"]) as c:
        assert c.send_labels(name, [label(f"later-{k}", "0") for k in range(3)])["pending"] == 3
    with Client(live.url, tenant.tokens["read"]) as c:
        waiting = c.pending(name)
    assert [p["id"] for p in waiting] == ["later-0", "later-1", "later-2"]
    assert all(p["age_hours"] >= 0 and p["dropped_after"] > p["received_at"] for p in waiting)
    with Client(live.url, tenant.tokens["admin"]) as c:
        assert c.erase(name, ["later-1"])["erased"]["pending_labels"] == 1
    with Client(live.url, tenant.tokens["read"]) as c:
        assert [p["id"] for p in c.pending(name)] == ["later-0", "later-2"]
    with Client(live.url, tenant.tokens["read"]) as c, pytest.raises(BelatedError) as info:
        c.erase(name, ids[7:])
    assert info.value.status == 403
    assert count(engine, "predictions", mid) == 5


def test_belated_erase_reads_ids_from_a_file(
    live: LiveServer, tenant: Tenant, engine: Engine, tmp_path: Path
) -> None:
    name, mid, ids = _filled(tenant, engine, 6)
    file = tmp_path / "ids.txt"
    file.write_text("\n".join([ids[0], f"  {ids[1]}  ", "", ids[2], "gone-already"]) + "\n")
    result = invoke("erase", str(file), "--model", name, url=live.url, token=tenant.tokens["admin"])
    assert result.exit_code == 0, result.output
    assert f"{name}: erased 3 predictions, 2 labels in history, 0 pending labels" in result.output
    assert "1 of 4 ids not found" in result.output and "not found: gone-already" in result.output
    assert count(engine, "predictions", mid) == 3

    file.write_text(ids[3] + "\n")
    result = invoke(
        "erase",
        str(file),
        "-m",
        name,
        "--format",
        "json",
        url=live.url,
        token=tenant.tokens["admin"],
    )
    assert result.exit_code == 0, result.output
    assert json.loads(result.output)["erased"]["predictions"] == 1

    refused = invoke("erase", str(file), "-m", name, url=live.url, token=tenant.tokens["read"])
    assert refused.exit_code == 1 and "admin" in refused.output
    empty = tmp_path / "empty.txt"
    empty.write_text("\n\n")
    result = invoke("erase", str(empty), "-m", name, url=live.url, token=tenant.tokens["admin"])
    assert result.exit_code == 2 and "no ids" in result.output
    assert count(engine, "predictions", mid) == 2
