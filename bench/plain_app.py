"""The plain alternative for bench/live.py: a FastAPI endpoint that inserts the rows it is
given into a table of the predictions' shape, with nothing else (no token, no model look-up,
no validation beyond parsing, no rollup bookkeeping). One psycopg connection per worker
thread on PostgreSQL; the stdlib sqlite3 module with WAL on SQLite.

    PLAIN_DSN=postgresql://... | sqlite:////path/file.db  uvicorn bench.plain_app:app
"""

from __future__ import annotations

import os
import sqlite3
import threading
from datetime import datetime
from typing import Any

import orjson
from fastapi import FastAPI, Request
from fastapi.concurrency import run_in_threadpool

DSN = os.environ["PLAIN_DSN"]
SQLITE = DSN.startswith("sqlite")
DDL = (
    "CREATE TABLE IF NOT EXISTS plain_predictions (model text NOT NULL, pid text NOT NULL,"
    " ts {ts} NOT NULL, hour integer NOT NULL, score double precision, tags {json},"
    " received_at {ts} NOT NULL, actual text, label_ts {ts}, PRIMARY KEY (model, pid))"
)
app = FastAPI()
_local = threading.local()
_sqlite_lock = threading.Lock()  # SQLite has one writer; a lock beats busy-waiting on it
_ddl_lock = threading.Lock()


def _connection() -> Any:
    conn = getattr(_local, "conn", None)
    if conn is not None:
        return conn
    with _ddl_lock:
        if SQLITE:
            conn = sqlite3.connect(DSN.removeprefix("sqlite:///"), check_same_thread=False)
            conn.execute("PRAGMA journal_mode=WAL")
            conn.execute("PRAGMA synchronous=NORMAL")
            conn.execute("PRAGMA busy_timeout=30000")
            conn.execute(DDL.format(ts="text", json="text"))
        else:
            import psycopg

            conn = psycopg.connect(DSN)
            # the API processes of --workers start together: IF NOT EXISTS alone races
            conn.execute("SELECT pg_advisory_xact_lock(7270)")
            conn.execute(DDL.format(ts="timestamptz", json="jsonb"))
        conn.commit()
    _local.conn = conn
    return conn


def _insert(model: str, items: list[dict[str, Any]]) -> int:
    now = datetime.now().astimezone()
    rows = []
    for item in items:
        ts = datetime.fromisoformat(item["ts"])
        tags = orjson.dumps(item["tags"]).decode() if item.get("tags") else None
        rows.append(
            (model, item["id"], ts, int(ts.timestamp() // 3600), item.get("score"), tags, now)
        )
    conn = _connection()
    if SQLITE:
        sql = (
            "INSERT OR IGNORE INTO plain_predictions"
            " (model, pid, ts, hour, score, tags, received_at) VALUES (?, ?, ?, ?, ?, ?, ?)"
        )
        with _sqlite_lock:
            conn.executemany(
                sql, [(*r[:2], r[2].isoformat(), *r[3:6], now.isoformat()) for r in rows]
            )
            conn.commit()
        return len(rows)
    sql = (
        "INSERT INTO plain_predictions (model, pid, ts, hour, score, tags, received_at)"
        " VALUES (%s, %s, %s, %s, %s, %s::jsonb, %s) ON CONFLICT DO NOTHING"
    )
    with conn.cursor() as cur:
        cur.executemany(sql, rows)
    conn.commit()
    return len(rows)


@app.post("/v1/models/{model}/predictions")
async def predictions(model: str, request: Request) -> dict[str, int]:
    """Insert the batch's rows."""
    body = orjson.loads(await request.body())
    n = await run_in_threadpool(_insert, model, body["predictions"])
    return {"accepted": n, "duplicates": 0}


def _update(model: str, items: list[dict[str, Any]]) -> int:
    rows = [
        (item["actual"], datetime.fromisoformat(item["ts"]), model, item["id"]) for item in items
    ]
    conn = _connection()
    if SQLITE:
        sql = "UPDATE plain_predictions SET actual = ?, label_ts = ? WHERE model = ? AND pid = ?"
        with _sqlite_lock:
            conn.executemany(sql, [(a, t.isoformat(), m, p) for a, t, m, p in rows])
            conn.commit()
        return len(rows)
    sql = "UPDATE plain_predictions SET actual = %s, label_ts = %s WHERE model = %s AND pid = %s"
    with conn.cursor() as cur:
        cur.executemany(sql, rows)
    conn.commit()
    return len(rows)


@app.post("/v1/models/{model}/labels")
async def labels(model: str, request: Request) -> dict[str, int]:
    """Set the labels of the batch's rows."""
    body = orjson.loads(await request.body())
    n = await run_in_threadpool(_update, model, body["labels"])
    return {"matched": n}
