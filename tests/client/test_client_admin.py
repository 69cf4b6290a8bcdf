"""The client's calls on models, rules, tokens and markers, over real HTTP on loopback."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone

import pytest
from sqlalchemy import Engine

from belated.client import BelatedError, Client
from tests.conftest import LiveServer, Tenant
from tests.support import rows, unique_name


def test_models_rules_keys_and_markers_through_the_client(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    name = unique_name()
    later = f"new sofa range for {name}"
    with Client(live.url, tenant.tokens["admin,ingest,read"]) as c:
        c.create_model(name=name, segment_keys=["region"])
        assert [m["name"] for m in c.models()] == [name]
        assert c.update_model(name, threshold=0.35)["threshold"] == 0.35
        rule = c.create_rule(name, kind="traffic", low=10, segment_by="region")
        assert [r["id"] for r in c.rules(name)] == [rule["id"]]
        with pytest.raises(BelatedError) as info:
            c.create_rule(name, kind="traffic", low=10, segment_by="regoin")
        assert info.value.status == 422 and "region" in info.value.detail
        c.delete_rule(name, rule["id"])
        assert c.rules(name) == [] and len(c.rules(name, retired=True)) == 1
        key = c.create_key(["read"], "nightly")
        assert key["token"].startswith("blt_")
        assert key["id"] in [k["id"] for k in c.keys()]
        c.revoke_key(key["id"])
        assert key["id"] not in [k["id"] for k in c.keys()]
        assert key["id"] in [k["id"] for k in c.keys(revoked=True)]
        berlin = timezone(timedelta(hours=2))
        made = c.add_marker(name, datetime(2026, 10, 1, 10, tzinfo=berlin), "supplier change")
        assert made["at"] == "2026-10-01T08:00:00Z"
        c.add_marker(name, "2026-11-01T00:00:00Z", later)
        assert [m["text"] for m in c.markers(name)] == ["supplier change", later]
        inside = c.markers(name, start=datetime(2026, 10, 15, tzinfo=UTC))
        assert [m["text"] for m in inside] == [later]
        with pytest.raises(BelatedError) as info:
            c.add_marker(name, "2026-10-01", "")
        assert info.value.status == 422 and info.value.errors[0]["field"] == "text"
        c.delete_marker(name, made["id"])
        assert [m["text"] for m in c.markers(name)] == [later]
        c.delete_model(name)
        assert c.models() == []
    assert rows(engine, "SELECT count(*) FROM markers WHERE text = :t", t=later)[0][0] == 0
