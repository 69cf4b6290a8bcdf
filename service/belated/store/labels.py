"""Store a validated labels batch: matches, corrections (kept in history) and pending labels."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any, NamedTuple

from sqlalchemy import delete, func, select
from sqlalchemy.orm import Session

from belated.clock import clock
from belated.ingest.validate import LabelIn
from belated.store import bulk, by_day, dirty, partitions, raw_retention
from belated.store.dialect import is_postgres, upsert
from belated.store.tables import Label, PendingLabel, Prediction, PredictionId
from belated.timeutil import to_utc

DELETE_CHUNK = 5000  # pending rows per DELETE
HISTORY_TYPES = ("int4", "text", "text", "timestamptz", "text", "timestamptz")
CHANGE_TYPES = ("int4", "int4", "int8", "text", "float8", "text", "float8")


class Change(NamedTuple):
    """One label change of a stored prediction, as logged in `label_changes`."""

    model_id: int
    hour: int
    row_id: int
    old_actual: str | None
    old_delay_h: float | None
    new_actual: str
    new_delay_h: float


@dataclass(slots=True)
class _Stored:
    """A stored prediction a label is for: where it is and its current label."""

    row_id: int
    ts: datetime
    hour: int
    actual: str | None
    delay_h: float | None
    at: str | None = None  # its address (ctid) while locked, PostgreSQL
    table: str | None = None  # the partition it was read from, PostgreSQL


def delay_hours(pred_ts: datetime, label_ts: datetime) -> float:
    """Hours from prediction to outcome, never negative (clock skew is not a delay)."""
    return max(0.0, (label_ts - pred_ts).total_seconds() / 3600.0)


# The stored predictions of a batch's ids, locked (concurrent corrections of one id apply
# one after another), read from their days' partitions only (store/by_day.py).
_TARGET_COLUMNS = "p.pid, p.row_id, p.ts, p.hour, p.actual, p.delay_h, p.at"
# one round trip: the registry, then each day's partition by name, rows locked in partition
# then id order (the function is migrations/versions/20261204_0022_label_targets.py)
_TARGETS_SQL = "SELECT * FROM label_targets(%(m)b, %(ids)b::text[])"


def _targets(session: Session, model_id: int, ids: list[str]) -> dict[str, _Stored]:
    found: dict[str, _Stored] = {}
    if is_postgres(session):
        raw = session.connection().connection.driver_connection
        assert raw is not None
        with raw.cursor() as cur:  # often a group's first statement: BEGIN rides with it
            rows = bulk.execute_opening(cur, _TARGETS_SQL, {"m": model_id, "ids": ids}).fetchall()
        for pid, row_id, ts, hour, actual, delay_h, at, table in rows:
            found[pid] = _Stored(row_id, to_utc(ts), hour, actual, delay_h, at, table)
        return found
    raw = session.connection().connection.driver_connection
    assert raw is not None
    for start in range(0, len(ids), bulk.SQLITE_CHUNK):
        chunk = ids[start : start + bulk.SQLITE_CHUNK]
        marks = ", ".join("?" for _ in chunk)
        for pid, row_id, ts, hour, actual, delay_h in raw.execute(
            "SELECT pid, row_id, ts, hour, actual, delay_h FROM predictions"
            f" WHERE model_id = ? AND pid IN ({marks})",
            (model_id, *chunk),
        ):
            stored_ts = bulk.sqlite_read_time(ts)
            assert stored_ts is not None
            found[pid] = _Stored(row_id, stored_ts, hour, actual, delay_h)
    return found


# Pending labels are looked up one index probe per id (store/by_day.py says why): as
# `pid = ANY(ids)` the id was a filter over every pending label of the model, not an index
# key (9.9 ms a look-up with 30,000 pending labels in bench/live.py, measured).
_PENDING_PROBE = """
SELECT k.pid, w.actual FROM unnest(%(ids)b::text[]) AS k(pid) CROSS JOIN LATERAL
  (SELECT w.actual FROM pending_labels w WHERE w.model_id = %(m)s AND w.pid = k.pid OFFSET 0) w
"""


_ANY_PENDING = "SELECT EXISTS (SELECT 1 FROM pending_labels WHERE model_id = %(m)s)"


def waiting_for(session: Session, model_id: int, ids: list[str]) -> list[str]:
    """Those of `ids` with a label waiting for their prediction (one index probe per id on
    PostgreSQL, after one probe for any label of the model waiting: the usual answer is
    none, and 10,000 probes cost a bulk batch 12.6 ms against 0.2 ms for the one). A label
    committed after either look-up is joined by the refresh (refresh.join_and_mark)."""
    if ids and is_postgres(session):
        if not bulk.fetch_all(session, _ANY_PENDING, {"m": model_id})[0][0]:
            return []
    return list(_pending(session, model_id, ids))


def _pending(session: Session, model_id: int, ids: list[str]) -> dict[str, str]:
    found: dict[str, str] = {}
    if not ids:
        return found
    if is_postgres(session):
        return {
            str(p): str(a)
            for p, a in bulk.fetch_all(session, _PENDING_PROBE, {"ids": ids, "m": model_id})
        }
    for cond in bulk.id_filters(session, PendingLabel.pid, ids):
        for pid, actual in session.execute(
            select(PendingLabel.pid, PendingLabel.actual).where(
                PendingLabel.model_id == model_id, cond
            )
        ):
            found[pid] = actual
    return found


def ingest(
    *, session: Session, model_id: int, items: list[LabelIn], now: datetime | None = None
) -> dict[str, int]:
    """Apply labels received `now` (the clock by default) in arrival order; the five counts
    add up to the batch size."""
    received = now or clock.now()
    if (
        len(items) > SMALL
        and is_postgres(session)
        and len({label.pid for label in items}) == len(items)
    ):
        answer, hours = _ingest_set_pg(session, model_id, items, received)
        dirty.mark(session=session, model_id=model_id, hours=hours, recompute=False, lock="shared")
        return answer
    answers, _ = ingest_batches(session=session, model_id=model_id, batches=[(items, received)])
    return answers[0]


_IN_STAGE = "stage_labels_in"
_IN_STAGE_DDL = "pid text, actual text, ts timestamptz"

# A large batch of distinct ids matched and written as sets in one statement (PostgreSQL):
# the same decisions as `ingest_batches` makes row by row, without carrying the stored rows
# to Python and back. Predictions are locked in id order, as everywhere else; a delay is
# never negative, as in `delay_hours`.
_SET_WRITE = f"""
WITH {{reads}}, t AS MATERIALIZED (
  SELECT s.pid, s.actual, s.ts AS label_ts, p.row_id, p.ts AS pred_ts, p.hour,
    p.actual AS old_actual, p.delay_h AS old_delay_h, p.at
  FROM {_IN_STAGE} s JOIN ({{union}}) p ON p.pid = s.pid
), ch AS MATERIALIZED (
  SELECT t.*, greatest(0.0, extract(epoch FROM t.label_ts - t.pred_ts)::float8 / 3600.0)
    AS delay_h
  FROM t WHERE t.old_actual IS DISTINCT FROM t.actual
), {{updates}}, hist AS (
  INSERT INTO labels (model_id, pid, actual, ts, change, received_at)
  SELECT %(m)s, pid, actual, label_ts,
    CASE WHEN old_actual IS NULL THEN 'first' ELSE 'correction' END, %(at)s
  FROM ch
), chg AS (
  INSERT INTO label_changes (model_id, hour, row_id, old_actual, old_delay_h, new_actual,
    new_delay_h)
  SELECT %(m)s, hour, row_id, old_actual, old_delay_h, actual, delay_h FROM ch
), gone AS (
  DELETE FROM pending_labels WHERE model_id = %(m)s AND pid IN (SELECT pid FROM t)
), un AS MATERIALIZED (
  SELECT s.* FROM {_IN_STAGE} s WHERE NOT EXISTS (SELECT 1 FROM t WHERE t.pid = s.pid)
), fresh AS MATERIALIZED (
  SELECT un.* FROM un LEFT JOIN pending_labels q ON q.model_id = %(m)s AND q.pid = un.pid
  WHERE q.actual IS DISTINCT FROM un.actual
), waiting AS (
  INSERT INTO pending_labels (model_id, pid, actual, ts, received_at)
  SELECT %(m)s, pid, actual, ts, %(at)s FROM fresh
  ON CONFLICT (model_id, pid) DO UPDATE
  SET actual = excluded.actual, ts = excluded.ts, received_at = excluded.received_at
), waiting_hist AS (
  INSERT INTO labels (model_id, pid, actual, ts, change, received_at)
  SELECT %(m)s, pid, actual, ts, 'pending', %(at)s FROM fresh
)
SELECT (SELECT count(*) FROM t), (SELECT count(*) FROM ch WHERE old_actual IS NULL),
  (SELECT count(*) FROM ch WHERE old_actual IS NOT NULL), (SELECT count(*) FROM un),
  (SELECT coalesce(array_agg(DISTINCT hour), '{{{{}}}}') FROM ch)
"""


# The staged ids' hours, one registry probe per id: as a join, the planner hashed the whole
# registry (146 ms a batch of 10,000 against 400,000 ids, measured; it grows with the store).
_STAGE_REGISTRY_SQL = (
    f"SELECT k.pid, r.hour FROM {_IN_STAGE} k CROSS JOIN LATERAL {partitions.REGISTRY_PROBE} r"
)


def set_write(session: Session, model_id: int, received: datetime) -> tuple[str, dict[str, Any]]:
    """The statement applying the staged labels batch (PostgreSQL), and its parameters."""
    where = {
        str(pid): int(h) for pid, h in bulk.fetch_all(session, _STAGE_REGISTRY_SQL, {"m": model_id})
    }
    reads, union, params = by_day.read_sql(
        by_day.group(session, where), _TARGET_COLUMNS, lock=True, hours=where
    )
    updates = by_day.update_sql(session, where.values(), "ch", at_column=True) or [
        "upd0 AS (SELECT 1)"
    ]
    sql = _SET_WRITE.format(reads=", ".join(reads), union=union, updates=", ".join(updates))
    return sql, {"m": model_id, "at": received, **params}


def _ingest_set_pg(
    session: Session, model_id: int, items: list[LabelIn], received: datetime
) -> tuple[dict[str, int], set[int]]:
    bulk.temp_table(session, _IN_STAGE, _IN_STAGE_DDL)
    bulk.copy_rows(
        session,
        _IN_STAGE,
        ("pid", "actual", "ts"),
        ((label.pid, label.actual, label.ts) for label in items),
        types=("text", "text", "timestamptz"),
    )
    # ids past retention (no prediction, raw rows dropped) are answered and stored nowhere
    expired = raw_retention.take_expired_from_stage(session, model_id, _IN_STAGE)
    sql, params = set_write(session, model_id, received)
    found, matched, corrected, pending, hours = bulk.fetch_all(session, sql, params)[0]
    answer = {
        "matched": matched,
        "pending": pending,
        "corrected": corrected,
        "unchanged": found - matched - corrected,
        "expired": expired,
    }
    return answer, set(hours)


def ingest_batches(
    *,
    session: Session,
    model_id: int,
    batches: list[tuple[list[LabelIn], datetime]],
    lock: str | None = "shared",
) -> tuple[list[dict[str, int]], set[int]]:
    """Apply several batches of one model (each with the time it was received) one after
    another, as if each were a request of its own; their answers and the hours touched.
    `lock=None` leaves the holds on those hours to the caller (store/dirty.py), who takes
    them last."""
    ids = list(dict.fromkeys(label.pid for items, _ in batches for label in items))
    targets = _targets(session, model_id, ids)
    unmatched = [i for i in ids if i not in targets]
    pending_now = _pending(session, model_id, unmatched)
    expired = raw_retention.expired_ids(session, model_id, unmatched)
    answers = [
        {"matched": 0, "pending": 0, "corrected": 0, "unchanged": 0, "expired": 0} for _ in batches
    ]
    updates: dict[int, dict[str, Any]] = {}
    history: list[dict[str, Any]] = []
    changes: list[Change] = []
    new_pending: dict[str, tuple[LabelIn, datetime]] = {}
    hours: set[int] = set()
    for label, received, answer in (
        (label, received, answer)
        for (items, received), answer in zip(batches, answers, strict=True)
        for label in items
    ):
        target = targets.get(label.pid)
        if target is None and label.pid in expired:
            answer["expired"] += 1  # its raw rows were dropped: stored nowhere
            continue
        if target is None:
            answer["pending"] += 1
            if pending_now.get(label.pid) != label.actual:
                pending_now[label.pid] = label.actual
                new_pending[label.pid] = (label, received)
                history.append(_history(model_id, label, "pending", received))
            continue
        if target.actual == label.actual:
            answer["unchanged"] += 1
            continue
        answer["corrected" if target.actual is not None else "matched"] += 1
        history.append(
            _history(
                model_id, label, "correction" if target.actual is not None else "first", received
            )
        )
        delay = delay_hours(target.ts, label.ts)
        changes.append(
            Change(
                model_id=model_id,
                hour=target.hour,
                row_id=target.row_id,
                old_actual=target.actual,
                old_delay_h=target.delay_h,
                new_actual=label.actual,
                new_delay_h=delay,
            )
        )
        target.actual, target.delay_h = label.actual, delay
        updates[target.row_id] = {
            "row_id": target.row_id,
            "hour": target.hour,
            "actual": label.actual,
            "label_ts": label.ts,
            "delay_h": delay,
            "at": target.at,
            "table": target.table,
        }
        hours.add(target.hour)
    found = [pid for pid in ids if pid in targets]
    if is_postgres(session) and max(len(updates), len(history), len(found)) <= SMALL:
        _write_small_pg(session, model_id, list(updates.values()), found, history, changes, hours)
        if new_pending:
            _upsert_pending(session, model_id, list(new_pending.values()))
        if lock is not None:
            dirty.lock_hours(session, model_id, sorted(hours), lock)
        return answers, hours
    if updates:
        (_update_pg if is_postgres(session) else _update_sqlite)(session, list(updates.values()))
    if found:  # a pending label left by a race is older than this one: drop it
        for cond in bulk.id_filters(session, PendingLabel.pid, found):
            session.execute(delete(PendingLabel).where(PendingLabel.model_id == model_id, cond))
    if history:
        cols = ("model_id", "pid", "actual", "ts", "change", "received_at")
        if is_postgres(session):  # one INSERT per row would cost more than the rest together
            bulk.insert_rows(
                session, "labels", cols, HISTORY_TYPES, [[h[c] for c in cols] for h in history]
            )
        else:
            bulk.sqlite_insert(
                session,
                "labels",
                cols,
                ([h[c] for c in cols] for h in history),
                times=("ts", "received_at"),
            )
    if new_pending:
        _upsert_pending(session, model_id, list(new_pending.values()))
    record_changes(session, changes)
    dirty.mark(session=session, model_id=model_id, hours=hours, recompute=False, lock=lock)
    return answers, hours


# Every write of a small labels batch in one round trip (PostgreSQL; arrays in binary): the
# labels set, their history, the changes for the refresh to fold, pending labels left by a
# race dropped, and the touched hours marked dirty (their holds are taken by the caller).
_SMALL_WRITE = """
WITH {updates}, hist AS (
  INSERT INTO labels (model_id, pid, actual, ts, change, received_at)
  SELECT %(m)s, * FROM unnest(%(h_pid)b::text[], %(h_actual)b::text[],
    %(h_ts)b::timestamptz[], %(h_change)b::text[], %(h_at)b::timestamptz[])
), chg AS (
  INSERT INTO label_changes (model_id, hour, row_id, old_actual, old_delay_h, new_actual,
    new_delay_h)
  SELECT %(m)s, * FROM unnest(%(c_hour)b::int4[], %(c_row)b::int8[], %(c_old)b::text[],
    %(c_old_delay)b::float8[], %(c_new)b::text[], %(c_new_delay)b::float8[])
), gone AS (
  DELETE FROM pending_labels WHERE row_id = ANY(ARRAY(
    SELECT w.row_id FROM unnest(%(found)b::text[]) AS k(pid) CROSS JOIN LATERAL (SELECT row_id
      FROM pending_labels w WHERE w.model_id = %(m)s AND w.pid = k.pid OFFSET 0) w))
), marks AS (
  INSERT INTO dirty_buckets (model_id, hour, marked_at, recompute)
  SELECT %(m)s, h, %(at)s, false FROM unnest(%(hours)b::int4[]) AS t(h)
)
SELECT 1
"""


_SMALL_SOURCE = (
    "(SELECT * FROM unnest(%(u_row)b::int8[], %(u_hour)b::int4[], %(u_actual)b::text[],"
    " %(u_ts)b::timestamptz[], %(u_delay)b::float8[]) AS v(row_id, hour, actual, label_ts,"
    " delay_h))"
)


def _write_small_pg(
    session: Session,
    model_id: int,
    updates: list[dict[str, Any]],
    found: list[str],
    history: list[dict[str, Any]],
    changes: list[Change],
    hours: set[int],
) -> None:
    changed = by_day.update_sql(
        session, (u["hour"] for u in updates), _SMALL_SOURCE, at="u_at", known=_read_from(updates)
    ) or ["upd0 AS (SELECT 1)"]
    bulk.execute_binary(
        session,
        _SMALL_WRITE.format(updates=", ".join(changed)),
        {
            "m": model_id,
            "at": clock.now(),
            "u_row": [u["row_id"] for u in updates],
            "u_hour": [u["hour"] for u in updates],
            "u_actual": [u["actual"] for u in updates],
            "u_ts": [u["label_ts"] for u in updates],
            "u_delay": [u["delay_h"] for u in updates],
            "u_at": [u["at"] for u in updates],
            "h_pid": [h["pid"] for h in history],
            "h_actual": [h["actual"] for h in history],
            "h_ts": [h["ts"] for h in history],
            "h_change": [h["change"] for h in history],
            "h_at": [h["received_at"] for h in history],
            "c_hour": [c.hour for c in changes],
            "c_row": [c.row_id for c in changes],
            "c_old": [c.old_actual for c in changes],
            "c_old_delay": [c.old_delay_h for c in changes],
            "c_new": [c.new_actual for c in changes],
            "c_new_delay": [c.new_delay_h for c in changes],
            "found": found,
            "hours": sorted(hours),
        },
    )


def record_changes(session: Session, changes: list[Change]) -> None:
    """Log label changes; the refresh folds them into the rollups of their hours and
    deletes them."""
    if not changes:
        return
    if is_postgres(session):
        bulk.insert_rows(session, "label_changes", Change._fields, CHANGE_TYPES, changes)
    else:
        bulk.sqlite_insert(session, "label_changes", Change._fields, changes)


def _history(model_id: int, label: LabelIn, change: str, received: datetime) -> dict[str, Any]:
    return {
        "model_id": model_id,
        "pid": label.pid,
        "actual": label.actual,
        "ts": label.ts,
        "change": change,
        "received_at": received,
    }


def _update_sqlite(session: Session, rows: list[dict[str, Any]]) -> None:
    bulk.sqlite_executemany(
        session,
        "UPDATE predictions SET actual = ?, label_ts = ?, delay_h = ? WHERE row_id = ?",
        ((r["actual"], r["label_ts"], r["delay_h"], r["row_id"]) for r in rows),
        times=(1,),
    )


SMALL = 1000  # up to this many rows, arrays in one statement beat a staging table and COPY


def _update_pg(session: Session, rows: list[dict[str, Any]]) -> None:
    # each day's partition named (store/by_day.py): the one its rows were locked in
    by_day.run_update(session, rows, _read_from(rows))


def _read_from(rows: list[dict[str, Any]]) -> dict[int, str]:
    """day → the table the rows of that day were read (and locked) from."""
    return {r["hour"] // 24: r["table"] for r in rows if r.get("table")}


_PENDING_UPSERT = """
INSERT INTO pending_labels (model_id, pid, actual, ts, received_at)
SELECT %(m)s, * FROM unnest(%(pid)b::text[], %(actual)b::text[], %(ts)b::timestamptz[],
  %(at)b::timestamptz[])
ON CONFLICT (model_id, pid) DO UPDATE
SET actual = excluded.actual, ts = excluded.ts, received_at = excluded.received_at
"""


def _upsert_pending(session: Session, model_id: int, items: list[tuple[LabelIn, datetime]]) -> None:
    """Store labels that wait for their predictions (one per id: `items` has distinct ids),
    replacing an earlier one of the same id."""
    if is_postgres(session):  # one statement, not one a row
        bulk.execute_binary(
            session,
            _PENDING_UPSERT,
            {
                "m": model_id,
                "pid": [i.pid for i, _ in items],
                "actual": [i.actual for i, _ in items],
                "ts": [i.ts for i, _ in items],
                "at": [received for _, received in items],
            },
        )
        return
    stmt = upsert(session, PendingLabel)
    stmt = stmt.on_conflict_do_update(
        index_elements=["model_id", "pid"],
        set_={
            "actual": stmt.excluded.actual,
            "ts": stmt.excluded.ts,
            "received_at": stmt.excluded.received_at,
        },
    )
    session.execute(
        stmt,
        [
            {
                "model_id": model_id,
                "pid": i.pid,
                "actual": i.actual,
                "ts": i.ts,
                "received_at": received,
            }
            for i, received in items
        ],
    )


def _latest_received(session: Session, model_id: int, pids: list[str]) -> dict[str, datetime]:
    """When the current label of each id arrived (from the label history)."""
    out: dict[str, datetime] = {}
    for cond in bulk.id_filters(session, Label.pid, pids) if pids else ():
        for pid, received in session.execute(
            select(Label.pid, func.max(Label.received_at))
            .where(Label.model_id == model_id, Label.change != "pending", cond)
            .group_by(Label.pid)
        ):
            out[pid] = to_utc(received)
    return out


def any_pending(*, session: Session, model_id: int, ids: list[str]) -> bool:
    """Whether a label waits for any of these ids."""
    for cond in bulk.id_filters(session, PendingLabel.pid, ids):
        query = select(PendingLabel.row_id).where(PendingLabel.model_id == model_id, cond)
        if session.execute(query.limit(1)).first() is not None:
            return True
    return False


def join_pending(*, session: Session, model_id: int, ids: list[str] | None) -> set[int]:
    """Apply pending labels whose prediction is stored; return the hours they touched.

    `ids` limits the search to those predictions (the ingest path); None searches all (the
    refresh job, which catches a label and its prediction written in concurrent transactions).
    """
    query = (
        select(
            PendingLabel.row_id.label("pending_row"),
            PendingLabel.pid,
            PendingLabel.actual.label("label"),
            PendingLabel.ts.label("label_ts"),
            PendingLabel.received_at,
            Prediction.row_id.label("prediction_row"),
            Prediction.ts.label("prediction_ts"),
            Prediction.hour,
            Prediction.actual.label("current"),
            Prediction.delay_h.label("current_delay_h"),
        )
        .join(
            Prediction,
            (Prediction.model_id == PendingLabel.model_id) & (Prediction.pid == PendingLabel.pid),
        )
        .where(PendingLabel.model_id == model_id)
    )
    if is_postgres(session) and ids is not None:  # only the day partitions of these ids
        hours = partitions.hours_of(session, model_id, ids)
        if not hours:
            return set()
        query = query.where(Prediction.hour.in_(hours))
    if is_postgres(session):
        # found through the registry (one day partition each, store/partitions.py); lock
        # both rows, so that a label written meanwhile for this id (which deletes the
        # pending row) is seen before deciding; in id order, as ingest locks predictions
        query = (
            query.join(
                PredictionId,
                (PredictionId.model_id == PendingLabel.model_id)
                & (PredictionId.pid == PendingLabel.pid)
                & (PredictionId.hour == Prediction.hour),
            )
            .order_by(Prediction.row_id)
            .with_for_update(of=[PendingLabel, Prediction])
        )
    conds = [None] if ids is None else list(bulk.id_filters(session, PendingLabel.pid, ids))
    rows: list[Any] = []
    for cond in conds:
        q = query if cond is None else query.where(cond)
        rows.extend(session.execute(q).all())
    if not rows:
        return set()
    latest = _latest_received(session, model_id, [r.pid for r in rows if r.current is not None])
    updates: list[dict[str, Any]] = []
    changes: list[Change] = []
    for r in rows:
        if r.current is not None and (
            r.current == r.label
            or latest.get(r.pid) is None
            or to_utc(r.received_at) <= latest[r.pid]
        ):
            continue  # the current label arrived after the pending one: it stands
        label_ts = to_utc(r.label_ts)
        delay = delay_hours(to_utc(r.prediction_ts), label_ts)
        updates.append(
            {
                "row_id": r.prediction_row,
                "hour": r.hour,
                "actual": r.label,
                "label_ts": label_ts,
                "delay_h": delay,
            }
        )
        changes.append(
            Change(
                model_id=model_id,
                hour=r.hour,
                row_id=r.prediction_row,
                old_actual=r.current,
                old_delay_h=r.current_delay_h,
                new_actual=r.label,
                new_delay_h=delay,
            )
        )
    if updates:
        (_update_pg if is_postgres(session) else _update_sqlite)(session, updates)
        record_changes(session, changes)
    done = [r.pending_row for r in rows]
    for start in range(0, len(done), DELETE_CHUNK):
        chunk = done[start : start + DELETE_CHUNK]
        session.execute(delete(PendingLabel).where(PendingLabel.row_id.in_(chunk)))
    return {r.hour for r in rows}
