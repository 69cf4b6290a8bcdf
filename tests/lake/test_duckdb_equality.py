"""The lake job on DuckDB equals belated's own HTTP ingest and refresh, row by row, and a
lake-fed model answers /metrics, /thresholds and /delays exactly like its HTTP-fed twin.

The reference is the service's own path (raw rows posted, labels folded by difference,
implied negatives at the cutoff): the same rows computed two ways must agree, counts
exactly and float sums within 1e-9 relative (DESIGN.md, "Architecture"). That path is in
turn checked against scikit-learn and numpy in tests/metrics.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from sqlalchemy import Engine

from belated.lake import build, build_totals
from belated.lake.schema import ARROW_STREAM, PARQUET, to_bytes
from belated.store import refresh
from tests.conftest import Tenant
from tests.support import create_model
from tests.support.datasets import START, assert_close
from tests.support.lake import (
    LAKE_MODEL,
    NOW,
    SETTINGS,
    assert_same_rollups,
    http_twin,
    shop_logs,
    stored,
)

RANGE = {"start": START.isoformat(), "end": (NOW.replace(hour=0, minute=0)).isoformat()}


def test_duckdb_rows_equal_the_http_path(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None, tmp_path: Path
) -> None:
    logs = shop_logs()
    twin = http_twin(tenant, engine, sessions, logs)
    want = stored(engine, twin.id)
    preds, labels = logs.write(tmp_path)
    got = build_totals(preds, labels, LAKE_MODEL, now=NOW, engine="duckdb")
    assert_same_rollups(got, want)
    # the data exercise what they claim to: implied negatives, segments, (other) not needed
    whole = [t for (h, k, v), t in want.items() if k == ""]
    assert sum(t["n_implied"] for t in whole) > 100
    assert sum(t["fp"] for t in whole) > 0 and sum(t["fn"] for t in whole) > 0
    assert {k for (_, k, _) in want} == {"", "region", "channel"}


def _answers(client: Any, name: str) -> dict[str, Any]:
    out = {}
    for path, params in (
        ("metrics", {"granularity": "day", **RANGE}),
        ("metrics", {"granularity": "week", **RANGE, "tag.region": "north"}),
        ("thresholds", RANGE),
        ("delays", {}),
    ):
        r = client.get(f"/v1/models/{name}/{path}", params=params)
        assert r.status_code == 200, r.text
        out[f"{path} {sorted(params)}"] = _without_name(r.json(), name)
    return out


def _without_name(value: Any, name: str) -> Any:
    if isinstance(value, dict):
        return {k: _without_name(v, name) for k, v in value.items() if v != name}
    if isinstance(value, list):
        return [_without_name(v, name) for v in value]
    return value


def test_a_lake_fed_model_answers_like_its_http_twin(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None, tmp_path: Path
) -> None:
    logs = shop_logs()
    twin = http_twin(tenant, engine, sessions, logs)
    lake = create_model(tenant, engine, source="lake", **SETTINGS)
    preds, labels = logs.write(tmp_path)
    table = build(preds, labels, LAKE_MODEL, now=NOW, engine="duckdb")
    # two uploads, one per format, of halves of the hours
    hours = sorted(set(table.column("hour").to_pylist()))
    half = hours[len(hours) // 2]
    first = table.filter([h < half for h in table.column("hour").to_pylist()])
    second = table.filter([h >= half for h in table.column("hour").to_pylist()])
    for part, media in ((first, ARROW_STREAM), (second, PARQUET)):
        r = tenant.client.put(
            f"/v1/models/{lake.name}/rollups",
            content=to_bytes(part, media),
            headers={"content-type": media},
        )
        assert r.status_code == 200, r.text
    assert_same_rollups(stored(engine, lake.id), stored(engine, twin.id))
    assert_same_rollups(stored(engine, lake.id, "d"), stored(engine, twin.id, "d"))
    # a rebuild recomputes from raw rows: a lake-fed model has none, and keeps its uploads
    assert refresh.rebuild(sessions, max_values=100, model_id=lake.id) == 0
    assert_same_rollups(stored(engine, lake.id), stored(engine, twin.id))
    page = tenant.client.get(f"/models/{lake.name}")
    assert page.status_code == 200 and lake.name in page.text
    got, want = _answers(tenant.client, lake.name), _answers(tenant.client, twin.name)
    assert got.keys() == want.keys()
    for key in want:
        assert_close(got[key], want[key], key)
