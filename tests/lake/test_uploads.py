"""Rollup uploads of a lake-fed model: every refusal names the first bad row and field and
stores nothing; lake-fed and HTTP-fed models refuse the other's writes with a 409."""

from __future__ import annotations

from collections.abc import Callable
from datetime import timedelta
from pathlib import Path
from typing import Any

import orjson
import pyarrow as pa
import pytest
from sqlalchemy import Engine, func, select

from belated.lake import LakeModel, build
from belated.lake.schema import ARROW_STREAM, PARQUET, arrow_schema, to_bytes, to_table
from belated.store.rollup_tables import Rollup, SegmentValue
from belated.store.totals import Totals
from tests.conftest import Tenant
from tests.support import create_model
from tests.support.lake import CLASSES, NOW, shop_logs

SETTINGS: dict[str, Any] = {
    "classes": CLASSES,
    "positive": "returned",
    "threshold": 0.4,
    "negative_after_days": 10,
    "segment_keys": ["region", "channel"],
}
BAD_ROW = 5


def _put(client: Any, model: str, table: pa.Table, media: str = ARROW_STREAM) -> Any:
    return client.put(
        f"/v1/models/{model}/rollups",
        content=to_bytes(table, media),
        headers={"content-type": media},
    )


def _state(engine: Engine, model_id: int) -> tuple[Any, ...]:
    with engine.connect() as conn:
        rows = conn.execute(
            select(Rollup.__table__)
            .where(Rollup.model_id == model_id)
            .order_by(Rollup.level, Rollup.start, Rollup.seg_key, Rollup.seg_value)
        ).all()
        values = conn.scalar(
            select(func.count()).select_from(SegmentValue).where(SegmentValue.model_id == model_id)
        )
    return tuple(tuple(r) for r in rows), values


@pytest.fixture()
def halves(tmp_path: Path) -> tuple[pa.Table, pa.Table]:
    """Rollup rows of small shop logs, split at a day into two uploads."""
    preds, labels = shop_logs(n=400).write(tmp_path)
    table = build(preds, labels, LakeModel.of({"kind": "binary", **SETTINGS}), now=NOW)
    hours = table.column("hour").to_pylist()
    half = sorted(set(hours))[len(set(hours)) // 2]
    return table.filter([h < half for h in hours]), table.filter([h >= half for h in hours])


def _changed(table: pa.Table, change: Callable[[dict[str, Any]], None]) -> pa.Table:
    rows = table.to_pylist()
    change(rows[BAD_ROW])
    return pa.Table.from_pylist(rows, schema=arrow_schema())


def _set(field: str, value: Any) -> Callable[[dict[str, Any]], None]:
    def change(row: dict[str, Any]) -> None:
        row[field] = value

    return change


def _hist_short(row: dict[str, Any]) -> None:
    row["hist"] = row["hist"][:-1]


def _off_the_hour(row: dict[str, Any]) -> None:
    row["hour"] = row["hour"] + timedelta(minutes=30)


def _inconsistent(row: dict[str, Any]) -> None:
    row["tn"] = row["tn"] + 1


def _foreign_key(row: dict[str, Any]) -> None:
    row["seg_key"], row["seg_value"] = "supplier", "oak-and-co"


BAD = [
    ("schema_version", _set("schema_version", 99), "schema_version"),
    ("negative count", _set("fn", -1), "fn"),
    ("hour not whole", _off_the_hour, "hour"),
    ("histogram of the wrong size", _hist_short, "hist"),
    ("counts that do not add up", _inconsistent, "tp"),
    ("a tag key the model does not keep", _foreign_key, "seg_key"),
]


@pytest.mark.parametrize(("what", "change", "field"), BAD, ids=[b[0] for b in BAD])
def test_a_bad_upload_is_refused_whole_naming_its_first_bad_row(
    tenant: Tenant,
    engine: Engine,
    frozen: None,
    halves: tuple[pa.Table, pa.Table],
    what: str,
    change: Callable[[dict[str, Any]], None],
    field: str,
) -> None:
    model = create_model(tenant, engine, source="lake", **SETTINGS)
    first, second = halves
    assert _put(tenant.client, model.name, first).status_code == 200
    before = _state(engine, model.id)
    bad = _changed(second, change)
    r = _put(tenant.client, model.name, bad, PARQUET)
    assert r.status_code == 422, (what, r.text)
    problem = r.json()
    assert problem["errors"][0]["index"] == BAD_ROW, problem
    assert problem["errors"][0]["field"] == field, problem
    assert f"row {BAD_ROW}" in problem["detail"] and "Nothing was stored" in problem["detail"]
    assert _state(engine, model.id) == before  # not one row of the good ones either


def test_an_hour_without_its_whole_model_row_is_refused(
    tenant: Tenant, engine: Engine, frozen: None, halves: tuple[pa.Table, pa.Table]
) -> None:
    model = create_model(tenant, engine, source="lake", **SETTINGS)
    second = halves[1]
    keep = [not (k == "" and i == 0) for i, k in enumerate(second.column("seg_key").to_pylist())]
    r = _put(tenant.client, model.name, second.filter(keep))
    assert r.status_code == 422, r.text
    assert r.json()["errors"][0]["field"] == "seg_key"
    assert "whole-model row" in r.json()["detail"]
    assert _state(engine, model.id) == ((), 0)


def test_a_class_the_multiclass_model_lacks_is_refused(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    classes = ["kept", "returned", "exchanged"]
    model = create_model(tenant, engine, source="lake", kind="multiclass", classes=classes)
    hour = int(NOW.timestamp()) // 3600 - 30
    rows = {}
    for h in range(hour, hour + 3):
        t = Totals.of({"n_pred": 5, "n_labelled": 3, "n_pred_pos": 0})
        t.cells = {orjson.dumps(["kept", "kept"]).decode(): 2, '["returned", "kept"]': 1}
        rows[(h, "", "")] = t
    rows[(hour + 2, "", "")].cells = {'["kept", "kept"]': 2, '["refunded", "kept"]': 1}
    r = _put(tenant.client, model.name, to_table(rows))
    assert r.status_code == 422, r.text
    error = r.json()["errors"][0]
    assert (error["index"], error["field"]) == (2, "cells")
    assert "'refunded'" in error["reason"]
    assert _state(engine, model.id) == ((), 0)
    rows[(hour + 2, "", "")].cells = {'["kept", "kept"]': 2, '["exchanged", "kept"]': 1}
    assert _put(tenant.client, model.name, to_table(rows)).status_code == 200
    assert len(_state(engine, model.id)[0]) == 3 + 1  # three hours and their day


def test_a_body_that_is_not_arrow_or_parquet_is_refused(tenant: Tenant, engine: Engine) -> None:
    model = create_model(tenant, engine, source="lake", **SETTINGS)
    r = tenant.client.put(
        f"/v1/models/{model.name}/rollups",
        content=b"hour,n_pred\n",
        headers={"content-type": "text/csv"},
    )
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "content-type"
    r = tenant.client.put(
        f"/v1/models/{model.name}/rollups", content=b"not arrow", headers={"content-type": PARQUET}
    )
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "body"
    assert _state(engine, model.id) == ((), 0)


def test_lake_and_http_models_refuse_each_others_writes(
    tenant: Tenant, engine: Engine, frozen: None, halves: tuple[pa.Table, pa.Table]
) -> None:
    lake = create_model(tenant, engine, source="lake", **SETTINGS)
    http = create_model(tenant, engine, **SETTINGS)
    when = (NOW - timedelta(hours=3)).isoformat()
    for kind, item in (
        ("predictions", {"id": "order-1", "ts": when, "score": 0.7}),
        ("labels", {"id": "order-1", "actual": "kept", "ts": when}),
    ):
        r = tenant.client.post(f"/v1/models/{lake.name}/{kind}", json={kind: [item]})
        assert r.status_code == 409, r.text
        assert "lake-fed" in r.json()["detail"] and "/rollups" in r.json()["detail"]
    r = _put(tenant.client, http.name, halves[0])
    assert r.status_code == 409 and "HTTP-fed" in r.json()["detail"]
    assert _state(engine, lake.id) == ((), 0) and _state(engine, http.id) == ((), 0)
    assert tenant.client.get(f"/v1/models/{lake.name}").json()["source"] == "lake"
    assert tenant.client.get(f"/v1/models/{lake.name}").json()["counts"]["predictions"] == 0
