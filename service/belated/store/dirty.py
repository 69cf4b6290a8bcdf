"""Dirty (model, hour) marks: every write adds a mark row for each hour it touched.

Marks are insert-only, so concurrent writers of one hour never wait on each other. What
keeps a refresh exact is a per-(model, hour) advisory lock on PostgreSQL: a writer holds its
hours shared from its mark to its commit, and a refresh holds the hours it works on
exclusively. A refresh therefore never sees a writer of its hours commit midway (the label
changes it folds and then deletes are all there is), and writers of one hour only ever wait
for a refresh of that hour, never for one another. Every party takes these locks in
ascending (model, hour) order, in one pass, so nobody waits in a cycle. SQLite has a single
writer (BEGIN IMMEDIATE) and needs none of this.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence

from sqlalchemy import insert
from sqlalchemy.orm import Session

from belated.clock import now
from belated.store import bulk
from belated.store.dialect import is_postgres
from belated.store.tables import DirtyBucket

_LOCK = {
    "shared": "pg_advisory_xact_lock_shared",
    "exclusive": "pg_advisory_xact_lock",
}


def _lock_sql(mode: str) -> str:
    return (
        f"SELECT count({_LOCK[mode]}(%(m)s, h)) FROM"
        " (SELECT h FROM unnest(%(hours)b::int4[]) AS t(h) ORDER BY h) AS s"
    )


def lock_hours(session: Session, model_id: int, hours: Sequence[int], mode: str) -> None:
    """Hold the hours of a model until the end of the transaction (PostgreSQL; ascending)."""
    if not hours or not is_postgres(session):
        return
    raw = session.connection().connection.driver_connection  # prepared: once per write
    assert raw is not None
    with raw.cursor() as cur:
        cur.execute(_lock_sql(mode), {"m": model_id, "hours": sorted(set(hours))}, prepare=True)


def hold_and_commit(session: Session, touched: Mapping[int, Iterable[int]]) -> None:
    """Hold the writer's hours shared (ascending by model, then hour) and commit, in one
    round trip on PostgreSQL (pipeline mode: the holds are granted before the COMMIT runs,
    as if sent one by one); SQLite has no holds and commits as usual. An error of either
    is raised here, with the transaction rolled back by the server."""
    if not is_postgres(session):
        session.commit()
        return
    raw = session.connection().connection.driver_connection
    assert raw is not None
    with raw.cursor() as cur, raw.pipeline():
        for model_id in sorted(touched):
            hours = sorted(set(touched[model_id]))
            if hours:
                cur.execute(_lock_sql("shared"), {"m": model_id, "hours": hours}, prepare=True)
        cur.execute("COMMIT")
    session.commit()  # the transaction is over: this only closes the session's own


def mark(
    *,
    session: Session,
    model_id: int,
    hours: Iterable[int],
    recompute: bool = True,
    lock: str | None = "shared",
) -> int:
    """Mark the hours dirty; return how many.

    `recompute=False` says only labels changed (their changes are in `label_changes`); a
    mark asking for a recompute is never outweighed by one that does not. `lock` is
    "shared" for writers and "exclusive" for a refresh that marks hours itself; None when
    the caller takes the locks of all its hours itself, in one ascending pass.
    """
    ordered = sorted(set(hours))
    if not ordered:
        return 0
    if lock is not None:
        lock_hours(session, model_id, ordered, lock)
    stamp = now()
    if is_postgres(session):  # the ORM's executemany cost a bulk batch ~5% of its time
        bulk.insert_rows(
            session,
            "dirty_buckets",
            ("model_id", "hour", "marked_at", "recompute"),
            ("int4", "int4", "timestamptz", "bool"),
            [(model_id, h, stamp, recompute) for h in ordered],
        )
        return len(ordered)
    session.execute(
        insert(DirtyBucket),
        [
            {"model_id": model_id, "hour": h, "marked_at": stamp, "recompute": recompute}
            for h in ordered
        ],
    )
    return len(ordered)
