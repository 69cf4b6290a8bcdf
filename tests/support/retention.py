"""The retention tests' data and readers: 100 days of the furniture shop's return
predictions and labels, every answer over a model's history, field-by-field differences,
rollup rows as plain values, and counts read with the database's own client."""

from __future__ import annotations

import json
import sqlite3
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import psycopg
from sqlalchemy import Engine

from tests.support.builders import stamp
from tests.support.store import stored_rollups

START = datetime(2026, 6, 1, tzinfo=UTC)  # a Monday
DAYS = 100
NOW = START + timedelta(days=DAYS, hours=12)
KEEP = 35
SETTINGS = {
    "label_delay_days": 5,
    "negative_after_days": 10,
    "keep_raw_days": KEEP,
    "segment_keys": ["region"],
}


def direct(engine: Engine, sql: str, *params: Any) -> list[tuple[Any, ...]]:
    """Rows of a query run with the database's own client (`?` placeholders)."""
    url = engine.url
    if url.get_backend_name() == "sqlite":
        assert url.database
        with sqlite3.connect(url.database) as conn:
            return list(conn.execute(sql, params))
    conninfo = f"host={url.host} port={url.port or 5432} user={url.username} dbname={url.database}"
    with psycopg.connect(conninfo) as conn:
        return list(conn.execute(sql.replace("?", "%s"), params).fetchall())


def shop_data(seed: int) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """100 days of the furniture shop's return predictions (20 a day, three regions) and
    the labels that have arrived by NOW (85% of them, 0 to 5 days late)."""
    rng = np.random.default_rng(seed)
    preds, labels = [], []
    for day in range(DAYS):
        for k in range(20):
            ts = START + timedelta(days=day, seconds=int(rng.integers(0, 86400)))
            score = float(rng.beta(2, 3))
            pid = f"order-{day}-{k}"
            region = ("north", "south", "east")[int(rng.integers(0, 3))]
            preds.append({"id": pid, "ts": stamp(ts), "score": score, "tags": {"region": region}})
            at = ts + timedelta(hours=float(rng.uniform(0, 120)))
            if rng.random() < 0.85 and at <= NOW:
                outcome = "1" if rng.random() < score else "0"
                labels.append({"id": pid, "actual": outcome, "ts": stamp(at)})
    return preds, labels


def every_window(client: Any, model: str) -> dict[str, Any]:
    """Every answer over the model's history: hourly, daily, weekly, rolling, by region,
    thresholds and delays."""
    end = START + timedelta(days=DAYS + 1)
    asks = {
        "day": {"granularity": "day", "start": stamp(START), "end": stamp(end)},
        "week": {
            "granularity": "week",
            "start": stamp(START),
            "end": stamp(START + timedelta(weeks=15)),
        },
        "hour-old": {
            "granularity": "hour",
            "start": stamp(START + timedelta(days=20)),
            "end": stamp(START + timedelta(days=24)),
        },
        "hour-edge": {
            "granularity": "hour",
            "start": stamp(START + timedelta(days=62)),
            "end": stamp(START + timedelta(days=68)),
        },
        "rolling": {"granularity": "day", "rolling": 7, "start": stamp(START), "end": stamp(end)},
        "north": {
            "granularity": "day",
            "start": stamp(START),
            "end": stamp(end),
            "tag.region": "north",
        },
    }
    out: dict[str, Any] = {}
    for name, params in asks.items():
        r = client.get(f"/v1/models/{model}/metrics", params=params)
        assert r.status_code == 200, r.text
        out[name] = r.json()
    span = {"start": stamp(START), "end": stamp(end)}
    for route in ("thresholds", "delays"):
        r = client.get(f"/v1/models/{model}/{route}", params=span if route == "thresholds" else {})
        assert r.status_code == 200, r.text
        out[route] = r.json()
    return out


def differences(a: Any, b: Any, path: str = "", rel: float = 0.0) -> list[str]:
    """Where two answers differ, field by field (paths), NaN equal to NaN; floats within
    `rel` relative when given."""
    if isinstance(a, dict) and isinstance(b, dict):
        out = [f"{path}.{k}: only on one side" for k in set(a) ^ set(b)]
        for k in sorted(set(a) & set(b)):
            out += differences(a[k], b[k], f"{path}.{k}", rel)
        return out
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return [f"{path}: {len(a)} items, then {len(b)}"]
        return [
            d
            for i, (x, y) in enumerate(zip(a, b, strict=True))
            for d in differences(x, y, f"{path}[{i}]", rel)
        ]
    if rel and isinstance(a, float) and isinstance(b, float) and abs(a - b) <= rel * abs(a):
        return []
    same = a == b or (isinstance(a, float) and isinstance(b, float) and np.isnan(a) and np.isnan(b))
    return [] if same else [f"{path}: {a!r}, then {b!r}"]


# the first hour kept: the midnight of the day holding NOW - KEEP days
FIRST_KEPT = int((NOW - timedelta(days=KEEP)).timestamp() // 3600) // 24 * 24


def rollup_rows(engine: Engine, model_id: int) -> dict[tuple[Any, ...], dict[str, Any]]:
    """Every rollup row of the model, histograms as plain lists, for exact comparison."""

    def plain(value: Any) -> Any:
        if isinstance(value, np.ndarray):
            return value.tolist()
        if isinstance(value, tuple):
            return [plain(v) for v in value]
        return json.loads(value) if isinstance(value, str) and value.startswith("{") else value

    return {
        k: {c: plain(v) for c, v in row.items()}
        for k, row in stored_rollups(engine, model_id).items()
    }


def hour_of(item: dict[str, Any]) -> int:
    """The epoch hour of a prediction item's time."""
    return int(datetime.fromisoformat(item["ts"]).timestamp() // 3600)
