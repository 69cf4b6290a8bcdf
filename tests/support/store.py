"""Rows of the store read with plain SQL, for assertions beside what the API answers."""

from __future__ import annotations

import json
from typing import Any

from sqlalchemy import Engine, text

from belated.store.packing import unpack_delays, unpack_hist
from belated.timeutil import from_db

# Tables that hold a model's data, each with a model_id column (asserted counts read these).
MODEL_TABLES = (
    "predictions",
    "labels",
    "pending_labels",
    "dirty_buckets",
    "threshold_changes",
    "label_changes",
)


def count(engine: Engine, table: str, model: int, where: str = "", **params: Any) -> int:
    """Rows of `table` that belong to the model (optionally narrowed by a SQL condition)."""
    assert table in MODEL_TABLES
    sql = f"SELECT count(*) FROM {table} WHERE model_id = :m" + (f" AND {where}" if where else "")
    with engine.connect() as conn:
        return int(conn.execute(text(sql), {"m": model, **params}).scalar_one())


def counts(engine: Engine, model: int) -> dict[str, int]:
    """Row counts of every data table of the model."""
    return {t: count(engine, t, model) for t in MODEL_TABLES}


def rows(engine: Engine, sql: str, **params: Any) -> list[Any]:
    """Run a query and return all rows."""
    with engine.connect() as conn:
        return list(conn.execute(text(sql), params).all())


def prediction_row(engine: Engine, model: int, pid: str) -> dict[str, Any]:
    """One stored prediction as a dict, times read back as aware UTC."""
    found = rows(
        engine,
        "SELECT pid, ts, hour, score, scores, predicted, tags, actual, label_ts"
        " FROM predictions WHERE model_id = :m AND pid = :p",
        m=model,
        p=pid,
    )
    assert len(found) == 1, f"{pid!r} stored {len(found)} times"
    row = dict(found[0]._mapping)
    row["ts"] = from_db(row["ts"])
    row["label_ts"] = from_db(row["label_ts"])
    for key in ("scores", "tags"):
        if isinstance(row[key], str):  # SQLite returns JSON columns as text to raw SQL
            row[key] = json.loads(row[key])
    return row


def stored_rollups(engine: Engine, model_id: int) -> dict[tuple[Any, ...], dict[str, Any]]:
    """Every rollup row of a model, keyed by (level, start, segment key, value), with its
    histogram and delays unpacked."""
    with engine.connect() as conn:
        found = conn.execute(text("SELECT * FROM rollups WHERE model_id = :m"), {"m": model_id})
        out = {}
        for row in found:
            r = dict(row._mapping)
            r["hist_counts"], r["hist_sums"] = unpack_hist(r.pop("hist"))
            r["delays"] = unpack_delays(r["delays"])
            out[(r["level"], r["start"], r["seg_key"], r["seg_value"])] = r
        return out
