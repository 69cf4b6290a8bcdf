"""Statements that name the day partitions they touch (PostgreSQL), instead of the parent.

A join of a batch's ids to the partitioned parent is planned over every partition it may
touch, and a nested loop into them is costed as if each loop scanned all of them: the
planner chose to hash-join the ids to every row of the touched days instead (500 ms for
1,000 labels against 1M predictions, measured, where the flat table took 14 ms). Here the
registry says which day holds each id, and each day's partition is named in a statement
of its own kind: a locked read (one CTE per day, rows locked in day then id order) or an
update (one CTE per day). Rows of a day without a partition are in the default partition.

Look-ups by id are written as one index probe per id (a LATERAL subquery the planner cannot
flatten: FOR UPDATE or OFFSET 0 in it), keyed by (model, id, hour), not as `pid = ANY(ids)`
or a join: a day's partition filled minutes ago has no statistics yet, and the planner,
believing it nearly empty, scanned every row of the model in it (8 ms for 20 ids among
20,000 rows against 0.5 ms probed; the registry the same, 7.9 ms against 0.4; measured,
PostgreSQL 15). The hour is compared as `p.hour + 0`, which no index can use: with the hour
as a key, a day without statistics costs the (model, hour) index as low as the (model, id,
hour) one and the planner took it, reading the whole hour for each id (0.7 to 1.7 s for 20
labels when a live system's predictions share an hour, measured); on (model, id) only the
unique index is a two-column match. Rows are locked in table then id order, the ids
sorted, in every statement that locks them this way.

Labels that are not staged (batches up to 1,000, the grouped writer's groups, larger
batches that repeat an id) find their rows with one call of the server-side function
`label_targets` instead (migrations/versions/20261204_0022_label_targets.py): the same
per-day statements, planned one by one inside PostgreSQL, in one round trip.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from sqlalchemy.orm import Session

from belated.store import bulk, partitions

_REGISTRY_SQL = f"""
SELECT k.pid, r.hour FROM unnest(%(ids)b::text[]) AS k(pid)
CROSS JOIN LATERAL {partitions.REGISTRY_PROBE} r
"""


def hours(session: Session, model_id: int, ids: Sequence[str]) -> dict[str, int]:
    """id → hour of the stored predictions among `ids`, from the registry."""
    raw = session.connection().connection.driver_connection
    assert raw is not None
    with raw.cursor() as cur:  # often a group's first statement: BEGIN rides with it
        rows = bulk.execute_opening(cur, _REGISTRY_SQL, {"ids": list(ids), "m": model_id})
        return {str(pid): int(hour) for pid, hour in rows.fetchall()}


def tables(session: Session, days: Iterable[int]) -> dict[int, str]:
    """day → the table holding its rows: its partition, or the default partition."""
    wanted = set(days)
    if not wanted:
        return {}
    have = partitions.have_partitions(session, wanted)
    return {d: partitions.day_name(d) if d in have else partitions.DEFAULT for d in wanted}


def group(session: Session, where: dict[str, int]) -> dict[str, list[str]]:
    """table → the ids whose rows it holds, for id → hour."""
    table_of = tables(session, {h // 24 for h in where.values()})
    out: dict[str, list[str]] = {}
    for pid, hour in where.items():
        out.setdefault(table_of[hour // 24], []).append(pid)
    return out


def read_sql(
    by_table: dict[str, list[str]],
    columns: str,
    *,
    lock: bool,
    hours: Mapping[str, int],
    prefix: str = "d",
) -> tuple[list[str], str, dict[str, Any]]:
    """The CTEs reading the model's rows of these ids from each table (locked in id order
    when `lock`), the UNION ALL of them, and their parameters (`%(m)s` is the caller's).

    `columns` are plain columns of `predictions p`, comma-separated; `p.at` is the row's
    address (ctid) as text. Only those columns are read (not `p.*`: the jsonb tags and
    scores cost their deforming). A table holding one id of the batch, as most do when a
    small batch spans many days, is probed by equality rather than through arrays: 0.68
    against 1.08 ms of planning and 2.1 against 3.1 ms in all for 20 ids over 18 days
    (measured, PostgreSQL 15, 1M predictions); same index, same key."""
    ctes: list[str] = []
    params: dict[str, Any] = {}
    suffix = "FOR UPDATE" if lock else "OFFSET 0"
    inner = ", ".join(
        "p.ctid::text AS at" if c.strip() == "p.at" else c.strip() for c in columns.split(",")
    )
    for i, (table, ids) in enumerate(sorted(by_table.items())):
        name = f"{prefix}{i}"
        if len(ids) == 1:
            params[name], params[f"{name}h"] = ids[0], hours[ids[0]]
            ctes.append(
                f"{name} AS (SELECT {inner} FROM {table} p WHERE p.model_id = %(m)s"
                f" AND p.pid = %({name})s AND p.hour + 0 = %({name}h)s {suffix})"
            )
            continue
        ordered = sorted(ids)
        params[name] = ordered
        params[f"{name}h"] = [hours[pid] for pid in ordered]
        ctes.append(
            f"{name} AS (SELECT {columns} FROM unnest(%({name})s::text[],"
            f" %({name}h)s::int4[]) AS k(pid, hour)"
            f" CROSS JOIN LATERAL (SELECT {inner} FROM {table} p"
            f" WHERE p.model_id = %(m)s AND p.pid = k.pid AND p.hour + 0 = k.hour {suffix}) p)"
        )
    if not ctes:
        ctes.append(f"{prefix}0 AS (SELECT {inner} FROM {partitions.DEFAULT} p WHERE FALSE)")
    union = " UNION ALL ".join(f"SELECT * FROM {prefix}{i}" for i in range(len(ctes)))
    return ctes, union, params


def fetch(
    session: Session, model_id: int, ids: Sequence[str], columns: str, *, lock: bool
) -> list[Any]:
    """The model's stored rows of `ids` (the `columns` of `predictions p`), locked when
    asked, read from their days' partitions only."""
    where = hours(session, model_id, ids)
    if not where:
        return []
    ctes, union, params = read_sql(group(session, where), columns, lock=lock, hours=where)
    raw = session.connection().connection.driver_connection
    assert raw is not None
    with raw.cursor() as cur:
        sql = f"WITH {', '.join(ctes)} {union}"
        return list(cur.execute(sql, {"m": model_id, **params}).fetchall())


def update_sql(
    session: Session,
    hours_of_rows: Iterable[int],
    source: str,
    at: str | None = None,
    *,
    at_column: bool = False,
    known: Mapping[int, str] | None = None,
) -> list[str]:
    """One UPDATE CTE per table of these hours, setting the label columns from `source` (a
    relation with row_id, hour, actual, label_ts, delay_h) for the rows it names.

    `at` names a text[] parameter with the rows' `at` (ctid) as read locked in this
    transaction (by `read_sql`); `at_column` says `source` has them as a column `at` (read
    locked earlier in the same statement). The rows are then fetched by address, whatever
    the statistics (a join on row_id scanned a young partition whole, 4.8 ms for 20 rows of
    20,000; in a statement over 60 days the batch's estimated size made every day's update
    a scan of its partition, a cost that grows with the store: 6 ms a day of 14,000 rows);
    the row_id join still decides which rows are set. `known` (day → table) names the
    tables the rows were read and locked from, which then hold them."""
    wanted = {h // 24 for h in hours_of_rows}
    if known and wanted <= known.keys():
        table_of = {d: known[d] for d in wanted}
    else:
        table_of = tables(session, wanted)
    by_table: dict[str, list[int]] = {}
    for day, table in table_of.items():
        by_table.setdefault(table, []).append(day)
    out = []
    for i, (table, days) in enumerate(sorted(by_table.items())):
        days_in = partitions.hours_clause((d * 24 for d in days), "u.hour")
        by_address = f" AND p.ctid = ANY(%({at})s::text[]::tid[])" if at else ""
        if at_column:
            mine = partitions.hours_clause((d * 24 for d in days), "a.hour")
            by_address += f" AND p.ctid = ANY(ARRAY(SELECT a.at::tid FROM {source} a WHERE {mine}))"
        out.append(
            f"upd{i} AS (UPDATE {table} p SET actual = u.actual, label_ts = u.label_ts,"
            f" delay_h = u.delay_h FROM {source} u WHERE p.row_id = u.row_id"
            f" AND p.hour = u.hour AND {days_in}{by_address})"
        )
    return out


def run_update(
    session: Session, rows: list[dict[str, Any]], known: Mapping[int, str] | None = None
) -> None:
    """Set the label columns of stored rows (row_id, hour, actual, label_ts, delay_h), in
    the tables `known` names for their days when given."""
    if not rows:
        return
    source = (
        "(SELECT * FROM unnest(%(row)s::int8[], %(hour)s::int4[], %(actual)s::text[],"
        " %(ts)s::timestamptz[], %(delay)s::float8[])"
        " AS v(row_id, hour, actual, label_ts, delay_h))"
    )
    ctes = update_sql(session, (r["hour"] for r in rows), source, known=known)
    raw = session.connection().connection.driver_connection
    assert raw is not None
    params = {
        "row": [r["row_id"] for r in rows],
        "hour": [r["hour"] for r in rows],
        "actual": [r["actual"] for r in rows],
        "ts": [r["label_ts"] for r in rows],
        "delay": [r["delay_h"] for r in rows],
    }
    with raw.cursor() as cur:
        cur.execute(f"WITH {', '.join(ctes)} SELECT 1", params)
