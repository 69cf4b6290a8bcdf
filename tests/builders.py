"""Small builders of test data (models, predictions, labels) and row counts read with SQL.

The furniture shop scenario: each prediction says whether an order will be returned; the
positive class "1" is "returned". Times are relative to the real clock, in the recent past,
because the service refuses prediction times more than a day ahead of its own clock.
"""

from __future__ import annotations

import json
import secrets
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import Engine, text

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


def utcnow() -> datetime:
    """The real current time, UTC."""
    return datetime.now(UTC)


def base_time() -> datetime:
    """The start of the hour two days ago: a safe, recent prediction time."""
    return (utcnow() - timedelta(days=2)).replace(minute=0, second=0, microsecond=0)


def stamp(dt: datetime) -> str:
    """RFC 3339 with a Z suffix."""
    return dt.astimezone(UTC).isoformat().replace("+00:00", "Z")


def epoch_hour(dt: datetime) -> int:
    """Whole hours since the Unix epoch (the bucket key the store uses)."""
    return int(dt.timestamp() // 3600)


def unique_name(prefix: str = "returns") -> str:
    """A model name no other test uses."""
    return f"{prefix}-{secrets.token_hex(4)}"


def model_body(name: str | None = None, **fields: Any) -> dict[str, Any]:
    """A POST /v1/models body; only the given settings are sent."""
    return {"name": name or unique_name(), **fields}


def score_of(n: int) -> float:
    """A deterministic score in [0, 1) that spreads over the range."""
    return (n * 37 % 100) / 100


def prediction(
    n: int, *, base: datetime | None = None, prefix: str = "order", **fields: Any
) -> dict[str, Any]:
    """Prediction number n: id `<prefix>-<n>`, one minute after the previous one."""
    when = (base or base_time()) + timedelta(minutes=n)
    item: dict[str, Any] = {"id": f"{prefix}-{n}", "ts": stamp(when), "score": score_of(n)}
    item.update(fields)
    return item


def predictions(
    count: int,
    *,
    start: int = 0,
    base: datetime | None = None,
    prefix: str = "order",
    **fields: Any,
) -> list[dict[str, Any]]:
    """`count` consecutive predictions."""
    base = base or base_time()
    return [prediction(n, base=base, prefix=prefix, **fields) for n in range(start, start + count)]


def label(pid: str, actual: str | int, ts: datetime | None = None) -> dict[str, Any]:
    """A label; without `ts` the service stamps the time it receives it."""
    item: dict[str, Any] = {"id": pid, "actual": actual}
    if ts is not None:
        item["ts"] = stamp(ts)
    return item


def outcome_of(n: int) -> str:
    """A deterministic true class for prediction n (returned for high scores, mostly)."""
    return "1" if score_of(n) >= 0.6 or n % 7 == 0 else "0"


def tags(count: int, *, key_len: int = 6, value_len: int = 5) -> dict[str, str]:
    """`count` distinct tags with keys and values of the given lengths."""
    return {(f"k{i}-" + "x" * key_len)[:key_len]: "v" * value_len for i in range(count)}


def three_class_scores(top: str, p_top: float, classes: tuple[str, ...]) -> dict[str, float]:
    """A scores map where `top` gets p_top and the rest share the remainder equally."""
    rest = (1.0 - p_top) / (len(classes) - 1)
    return {c: (p_top if c == top else rest) for c in classes}


@dataclass(frozen=True)
class Model:
    """A model created through the API, with its row id for SQL counts."""

    name: str
    id: int


def model_id(engine: Engine, project_id: int, name: str) -> int:
    """The row id of a project's model."""
    with engine.connect() as conn:
        return int(
            conn.execute(
                text("SELECT id FROM models WHERE project_id = :p AND name = :n"),
                {"p": project_id, "n": name},
            ).scalar_one()
        )


def create_model(tenant: Any, engine: Engine, **fields: Any) -> Model:
    """Create a model over the API (all-scopes token) and look up its id."""
    body = model_body(**fields)
    r = tenant.client.post("/v1/models", json=body, headers=tenant.headers("admin"))
    assert r.status_code == 201, r.text
    return Model(body["name"], model_id(engine, tenant.project_id, body["name"]))


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
