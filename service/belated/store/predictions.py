"""Store a validated predictions batch: all or nothing, duplicates known, pending labels joined."""

from __future__ import annotations

from collections.abc import Iterable
from datetime import datetime
from typing import Any

import orjson
import psycopg
from sqlalchemy import select, text
from sqlalchemy.orm import Session

from belated.clock import clock
from belated.errors import Conflict
from belated.ingest.validate import PredictionIn
from belated.store import bulk, by_day, dirty, labels, partitions, raw_retention
from belated.store.dialect import is_postgres
from belated.store.tables import Prediction
from belated.timeutil import to_utc

_STAGE = "stage_predictions"
_STAGE_DDL = (
    "pid text, ts timestamptz, hour integer, score float8, scores text, predicted text, "
    "tags text, received_at timestamptz"
)
_COLUMNS = ("pid", "ts", "hour", "score", "scores", "predicted", "tags", "received_at")
_TYPES = ("text", "timestamptz", "int4", "float8", "text", "text", "text", "timestamptz")


def epoch_hour(ts: datetime) -> int:
    """Whole hours since the Unix epoch: the bucket key of a prediction time."""
    return int(ts.timestamp() // 3600)


def existing(*, session: Session, model_id: int, ids: list[str]) -> dict[str, PredictionIn]:
    """The stored predictions among `ids`, as comparable values."""
    found: dict[str, PredictionIn] = {}
    cols = (
        Prediction.pid,
        Prediction.ts,
        Prediction.score,
        Prediction.scores,
        Prediction.predicted,
        Prediction.tags,
    )
    if is_postgres(session):  # from their days' partitions only (store/by_day.py)
        columns = "p.pid, p.ts, p.score, p.scores, p.predicted, p.tags"
        for pid, ts, score, scores, predicted, tags in by_day.fetch(
            session, model_id, ids, columns, lock=False
        ):
            found[pid] = PredictionIn(pid, to_utc(ts), score, scores, predicted, tags or None)
        return found
    for cond in bulk.id_filters(session, Prediction.pid, ids):
        query = select(*cols).where(Prediction.model_id == model_id, cond)
        for pid, ts, score, scores, predicted, tags in session.execute(query):
            found[pid] = PredictionIn(pid, to_utc(ts), score, scores, predicted, tags or None)
    return found


def _conflict(ids: list[str]) -> Conflict:
    shown = ", ".join(repr(i) for i in ids[:20]) + (" ..." if len(ids) > 20 else "")
    return Conflict(
        f"{len(ids)} id(s) already stored with different content: {shown}. "
        "Predictions are immutable; nothing of this batch was stored.",
        title="Conflicting duplicate",
        ids=ids[:100],
    )


def ingest(
    *,
    session: Session,
    model_id: int,
    preds: list[PredictionIn],
    batch_size: int,
    now: datetime | None = None,
) -> dict[str, int]:
    """Insert the new predictions received `now` (the clock by default); answer accepted and
    duplicate counts."""
    received = now or clock.now()
    raw_retention.refuse_before(session=session, model_id=model_id, preds=preds)
    waiting: list[str] | None = None  # the new ids with a pending label; None: not known
    hours: list[int] = []  # each prediction's hour (PostgreSQL)
    if is_postgres(session):
        # insert first (ON CONFLICT DO NOTHING) and compare only the ids already stored; a
        # conflict raises, and the request's transaction rolls the whole batch back
        hours = [epoch_hour(p.ts) for p in preds]  # once: the uses below
        partitions.ensure_hours(session, set(hours))
        if not preds:
            inserted: set[str] = set()
        elif len(preds) <= SMALL_BATCH:
            inserted, waiting = _insert_small_pg(session, model_id, preds, hours, received)
        else:
            inserted = _insert_pg(session, model_id, preds, hours, received)
        rest = [p for p in preds if p.pid not in inserted]
    else:
        inserted, rest = set(), preds
    stored = existing(session=session, model_id=model_id, ids=[p.pid for p in rest]) if rest else {}
    conflicts = [p.pid for p in rest if p.pid in stored and not p.same_as(stored[p.pid])]
    if conflicts:
        raise _conflict(conflicts)
    if is_postgres(session):
        new = [p for p in preds if p.pid in inserted]
    else:  # SQLite has one writer (BEGIN IMMEDIATE): the lookup above is authoritative
        new = [p for p in preds if p.pid not in stored]
        if new:
            _insert_sqlite(session, model_id, new, received)
    if new:
        if hours and len(new) == len(preds):  # PostgreSQL, every prediction new
            touched = set(hours)
        else:
            touched = {epoch_hour(p.ts) for p in new}
        if waiting is None:
            waiting = labels.waiting_for(session, model_id, [p.pid for p in new])
        if waiting:
            touched |= labels.join_pending(session=session, model_id=model_id, ids=waiting)
        dirty.mark(session=session, model_id=model_id, hours=touched)
    return {"accepted": len(new), "duplicates": batch_size - len(new)}


def _insert_sqlite(
    session: Session, model_id: int, new: list[PredictionIn], received: datetime
) -> None:
    insert_sqlite(session, ((model_id, p, received) for p in new))


def insert_sqlite(session: Session, items: Iterable[tuple[int, PredictionIn, datetime]]) -> None:
    """Insert (model id, prediction, time received) rows on SQLite through the DBAPI."""
    bulk.sqlite_insert(
        session,
        "predictions",
        (*_DIRECT_COLUMNS, "received_at"),
        (
            (
                model_id,
                p.pid,
                p.ts,
                epoch_hour(p.ts),
                p.score,
                bulk.sqlite_json(p.scores),
                p.predicted,
                bulk.sqlite_json(p.tags),
                received,
            )
            for model_id, p, received in items
        ),
        times=("ts", "received_at"),
    )


# One statement for a small batch: register the ids (the registry keeps (model, id) unique
# across the day partitions), insert the rows of those that were new from arrays (no
# staging table; the arrays are sent in binary, which costs a sixth of the text format) and
# answer
# which ids were new and which of those have a label waiting for them.
_SMALL_SQL = """
WITH reg AS (
  INSERT INTO prediction_ids (model_id, pid, hour)
  SELECT %(m)b, r.pid, r.hour FROM unnest(%(pid)b::text[], %(hour)b::int4[]) AS r(pid, hour)
  ON CONFLICT (model_id, pid) DO NOTHING
  RETURNING pid
), ins AS (
  INSERT INTO predictions (model_id, pid, ts, hour, score, scores, predicted, tags, received_at)
  SELECT %(m)b, r.pid, r.ts, r.hour, r.score, r.scores::jsonb, r.predicted, r.tags::jsonb,
    %(at)b
  FROM unnest(%(pid)b::text[], %(ts)b::timestamptz[], %(hour)b::int4[], %(score)b::float8[],
    %(scores)b::text[], %(predicted)b::text[], %(tags)b::text[])
    AS r(pid, ts, hour, score, scores, predicted, tags)
  JOIN reg ON reg.pid = r.pid
  RETURNING pid
)
SELECT ins.pid, EXISTS (
  SELECT 1 FROM pending_labels w WHERE w.model_id = %(m)b AND w.pid = ins.pid
) FROM ins
"""
SMALL_BATCH = 200


def _insert_small_pg(
    session: Session, model_id: int, new: list[PredictionIn], hours: list[int], received: datetime
) -> tuple[set[str], list[str]]:
    """Insert a small batch in one round trip; the ids stored and those of them with a
    pending label."""
    raw = session.connection().connection.driver_connection
    assert raw is not None
    params = {
        "m": model_id,
        "at": received,
        "pid": [p.pid for p in new],
        "ts": [p.ts for p in new],
        "hour": hours,
        "score": [p.score for p in new],
        "scores": [bulk.json_text(p.scores) for p in new],
        "predicted": [p.predicted for p in new],
        "tags": [bulk.json_text(p.tags) for p in new],
    }
    with raw.cursor() as cur:
        rows = cur.execute(_SMALL_SQL, params, prepare=True).fetchall()
    return {r[0] for r in rows}, [r[0] for r in rows if r[1]]


_DIRECT_COLUMNS = ("model_id", "pid", "ts", "hour", "score", "scores", "predicted", "tags")


# jsonb's binary form is a version byte (1) and the JSON text. COPY reads each field with the
# column's own receive function, so these bytes are sent as they are (declared bytea to the
# client): one JSON encoding per tag set of a batch rather than a wrapper and an encoding
# per row (validation hands the rows of one tag set the same dict).
_COPY_TYPES = ("int4", "text", "timestamptz", "int4", "float8", "bytea", "text", "bytea")


def _jsonb_copy(value: Any, done: dict[int, bytes]) -> bytes | None:
    """The binary jsonb of a value (None stays NULL), encoded once per object of a batch;
    `done` lives as long as the batch, so an object's id is not reused meanwhile."""
    if value is None:
        return None
    found = done.get(id(value))
    if found is None:
        found = done[id(value)] = b"\x01" + orjson.dumps(value)
    return found


def _copy_direct_pg(
    session: Session, model_id: int, new: list[PredictionIn], hours: list[int], received: datetime
) -> bool:
    """COPY a batch straight into `predictions`, as a plain bulk load would; False, with
    nothing written, when one of its ids is already stored (a resent batch).

    Fresh batches are the common case, and a plain insert costs PostgreSQL about a third
    less than INSERT ... ON CONFLICT from a staging table (the speculative insertion and
    the staging). A unique violation undoes only the savepoint, and the caller falls back
    to the staged insert, which sorts the new from the stored."""
    raw = session.connection().connection.driver_connection
    assert raw is not None
    done: dict[int, bytes] = {}
    rows = (
        (
            model_id,
            p.pid,
            p.ts,
            hour,
            p.score,
            _jsonb_copy(p.scores, done),
            p.predicted,
            _jsonb_copy(p.tags, done),
            received,
        )
        for p, hour in zip(new, hours, strict=True)
    )
    try:
        with raw.transaction():  # a savepoint inside the request's transaction
            bulk.copy_rows(  # the registry first: it refuses an id stored on any day
                session,
                partitions.REGISTRY,
                ("model_id", "pid", "hour"),
                ((model_id, p.pid, hour) for p, hour in zip(new, hours, strict=True)),
                types=("int4", "text", "int4"),
            )
            bulk.copy_rows(
                session,
                "predictions",
                (*_DIRECT_COLUMNS, "received_at"),
                rows,
                types=(*_COPY_TYPES, "timestamptz"),
            )
    except psycopg.errors.UniqueViolation:
        return False
    return True


def _insert_pg(
    session: Session, model_id: int, new: list[PredictionIn], hours: list[int], received: datetime
) -> set[str]:
    if _copy_direct_pg(session, model_id, new, hours, received):
        return {p.pid for p in new}
    bulk.temp_table(session, _STAGE, _STAGE_DDL)
    bulk.copy_rows(
        session,
        _STAGE,
        _COLUMNS,
        (
            (
                p.pid,
                p.ts,
                hour,
                p.score,
                bulk.json_text(p.scores),
                p.predicted,
                bulk.json_text(p.tags),
                received,
            )
            for p, hour in zip(new, hours, strict=True)
        ),
        types=_TYPES,  # binary COPY: a ninth of the text format's cost in this process
    )
    result = session.execute(
        text(
            "WITH reg AS (INSERT INTO prediction_ids (model_id, pid, hour)"
            f" SELECT :m, pid, hour FROM {_STAGE} ON CONFLICT (model_id, pid) DO NOTHING"
            " RETURNING pid)"
            " INSERT INTO predictions (model_id, pid, ts, hour, score, scores, predicted, tags,"
            " received_at) SELECT :m, s.pid, ts, hour, score, scores::jsonb, predicted,"
            f" tags::jsonb, received_at FROM {_STAGE} s JOIN reg ON reg.pid = s.pid"
            " RETURNING pid"
        ),
        {"m": model_id},
    )
    return {row[0] for row in result}
