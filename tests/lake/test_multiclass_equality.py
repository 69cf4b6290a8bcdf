"""A multiclass lake-fed model: the DuckDB job's rollup rows (confusion cells, counts,
implied negatives, delays) equal the HTTP path's, and its /metrics answers equal its
HTTP-fed twin's.

The orders, times and label histories are those of tests/support/lake.py (breast cancer
scores, seeded); each order's two binary outcomes are mapped to two of three classes by its
number, so corrections stay corrections and repeats stay repeats. Class probabilities are
seeded Dirichlet(1, 1, 1) draws; the predicted class is the most probable one.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from sqlalchemy import Engine

from belated.lake import LakeModel, build, build_totals
from belated.lake.schema import PARQUET, to_bytes
from belated.store import refresh
from tests.conftest import Tenant
from tests.support import create_model
from tests.support.builders import stamp
from tests.support.datasets import START, assert_close
from tests.support.lake import NOW, assert_same_rollups, shop_logs, stored
from tests.support.sending import send

CLASSES = ["kept", "returned", "exchanged"]
SETTINGS: dict[str, Any] = {"kind": "multiclass", "classes": CLASSES, "negative_after_days": 10}
RANGE = {"start": START.isoformat(), "end": NOW.replace(hour=0, minute=0).isoformat()}


def _logs(tmp_path: Path) -> tuple[list[dict[str, Any]], list[dict[str, Any]], str, str]:
    logs = shop_logs(n=1500, seed=5)
    rng = np.random.default_rng(5)
    probs = rng.dirichlet([1.0, 1.0, 1.0], len(logs.predictions))
    preds = []
    for p, pr in zip(logs.predictions, probs, strict=True):
        scores = {c: float(x) for c, x in zip(CLASSES, pr, strict=True)}
        preds.append({**p, "scores": scores, "predicted": CLASSES[int(np.argmax(pr))]})

    def mapped(pid: str, value: str) -> str:
        n = int(pid.split("-")[1]) if pid.startswith("order-") else 0
        return CLASSES[(n + (value == "returned")) % 3]

    labels = [{**r, "actual": mapped(r["id"], r["actual"])} for r in logs.labels]
    p_path, l_path = tmp_path / "p.parquet", tmp_path / "l.parquet"
    pq.write_table(
        pa.table(
            {
                "id": [p["id"] for p in preds],
                "ts": pa.array([p["ts"] for p in preds], pa.timestamp("us", "UTC")),
                "predicted": [p["predicted"] for p in preds],
                "region": [p["region"] for p in preds],
            }
        ),
        p_path,
    )
    pq.write_table(
        pa.table(
            {
                "id": [r["id"] for r in labels],
                "actual": [r["actual"] for r in labels],
                "ts": pa.array([r["ts"] for r in labels], pa.timestamp("us", "UTC")),
                "received_at": pa.array(
                    [r["received_at"] for r in labels], pa.timestamp("us", "UTC")
                ),
            }
        ),
        l_path,
    )
    return preds, labels, str(p_path), str(l_path)


def _send(
    client: Any, model: str, preds: list[dict[str, Any]], labels: list[dict[str, Any]]
) -> None:
    items = [
        {
            "id": p["id"],
            "ts": stamp(p["ts"]),
            "scores": p["scores"],
            "tags": {"region": p["region"]},
        }
        for p in preds
    ]
    send(client, model, "predictions", items)
    batch: list[dict[str, Any]] = []
    for r in labels:  # arrival order; an id once per request
        if any(b["id"] == r["id"] for b in batch):
            send(client, model, "labels", batch)
            batch = []
        batch.append({"id": r["id"], "actual": r["actual"], "ts": stamp(r["ts"])})
    send(client, model, "labels", batch)


def test_multiclass_rows_and_answers_equal_the_http_path(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None, tmp_path: Path
) -> None:
    preds, labels, p_path, l_path = _logs(tmp_path)
    twin = create_model(tenant, engine, **SETTINGS)
    _send(tenant.client, twin.name, preds, labels)
    refresh.join_and_mark(sessions)
    refresh.refresh_all(sessions, max_values=100)
    model = LakeModel.of(SETTINGS)
    want = stored(engine, twin.id)
    assert_same_rollups(build_totals(p_path, l_path, model, now=NOW), want)
    whole = [t for (_, k, _), t in want.items() if k == ""]
    # the confusion cells hold the explicit labels (implied negatives are counted apart)
    assert sum(t["n_implied"] for t in whole) > 50
    assert all(sum((t.cells or {}).values()) == t["n_labelled"] - t["n_implied"] for t in whole)
    lake = create_model(tenant, engine, source="lake", **SETTINGS)
    table = build(p_path, l_path, model, now=NOW)
    r = tenant.client.put(
        f"/v1/models/{lake.name}/rollups",
        content=to_bytes(table, PARQUET),
        headers={"content-type": PARQUET},
    )
    assert r.status_code == 200, r.text
    for params in (
        {"granularity": "day", **RANGE},
        {"granularity": "week", **RANGE, "tag.region": "south"},
    ):
        got = tenant.client.get(f"/v1/models/{lake.name}/metrics", params=params)
        exp = tenant.client.get(f"/v1/models/{twin.name}/metrics", params=params)
        assert got.status_code == exp.status_code == 200, got.text
        a, b = got.json(), exp.json()
        a.pop("model", None), b.pop("model", None)
        assert_close(a, b, str(params))
