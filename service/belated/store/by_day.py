"""Statements that name the day partitions they touch (PostgreSQL), instead of the parent.

A join of a batch's ids to the partitioned parent is planned over every partition it may
touch, and a nested loop into them is costed as if each loop scanned all of them: the
planner chose to hash-join the ids to every row of the touched days instead (500 ms for
1,000 labels against 1M predictions, measured, where the flat table took 14 ms). Here the
registry says which day holds each id, and each day's partition is named in a statement
of its own kind: a locked read (one CTE per day, rows locked in day then row order) or an
update (one CTE per day). Rows of a day without a partition are in the default partition.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any

from sqlalchemy.orm import Session

from belated.store import partitions

_REGISTRY_SQL = """
SELECT r.pid, r.hour FROM unnest(%(ids)b::text[]) AS k(pid)
JOIN prediction_ids r ON r.model_id = %(m)s AND r.pid = k.pid
"""


def hours(session: Session, model_id: int, ids: Sequence[str]) -> dict[str, int]:
    """id → hour of the stored predictions among `ids`, from the registry."""
    raw = session.connection().connection.driver_connection
    assert raw is not None
    with raw.cursor() as cur:
        rows = cur.execute(_REGISTRY_SQL, {"ids": list(ids), "m": model_id}, prepare=True)
        return {str(pid): int(hour) for pid, hour in rows.fetchall()}


def tables(session: Session, days: Iterable[int]) -> dict[int, str]:
    """day → the table holding its rows: its partition, or the default partition."""
    wanted = set(days)
    if not wanted:
        return {}
    have = partitions.existing_days(session.connection())
    return {d: partitions.day_name(d) if d in have else partitions.DEFAULT for d in wanted}


def group(session: Session, where: dict[str, int]) -> dict[str, list[str]]:
    """table → the ids whose rows it holds, for id → hour."""
    table_of = tables(session, {h // 24 for h in where.values()})
    out: dict[str, list[str]] = {}
    for pid, hour in where.items():
        out.setdefault(table_of[hour // 24], []).append(pid)
    return out


def read_sql(
    by_table: dict[str, list[str]], columns: str, *, lock: bool, prefix: str = "d"
) -> tuple[list[str], str, dict[str, Any]]:
    """The CTEs reading the model's rows of these ids from each table (locked in row order
    when `lock`), the UNION ALL of them, and their parameters (`%(m)s` is the caller's)."""
    ctes, params = [], {}
    suffix = " ORDER BY p.row_id FOR UPDATE" if lock else ""
    for i, (table, ids) in enumerate(sorted(by_table.items())):
        params[f"{prefix}{i}"] = ids
        ctes.append(
            f"{prefix}{i} AS (SELECT {columns} FROM {table} p WHERE p.model_id = %(m)s"
            f" AND p.pid = ANY(%({prefix}{i})s::text[]){suffix})"
        )
    if not ctes:
        ctes.append(f"{prefix}0 AS (SELECT {columns} FROM {partitions.DEFAULT} p WHERE FALSE)")
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
    ctes, union, params = read_sql(group(session, where), columns, lock=lock)
    raw = session.connection().connection.driver_connection
    assert raw is not None
    with raw.cursor() as cur:
        sql = f"WITH {', '.join(ctes)} {union}"
        return list(cur.execute(sql, {"m": model_id, **params}).fetchall())


def update_sql(session: Session, hours_of_rows: Iterable[int], source: str) -> list[str]:
    """One UPDATE CTE per table of these hours, setting the label columns from `source` (a
    relation with row_id, hour, actual, label_ts, delay_h) for the rows it names."""
    table_of = tables(session, {h // 24 for h in hours_of_rows})
    by_table: dict[str, list[int]] = {}
    for day, table in table_of.items():
        by_table.setdefault(table, []).append(day)
    out = []
    for i, (table, days) in enumerate(sorted(by_table.items())):
        days_in = partitions.hours_clause((d * 24 for d in days), "u.hour")
        out.append(
            f"upd{i} AS (UPDATE {table} p SET actual = u.actual, label_ts = u.label_ts,"
            f" delay_h = u.delay_h FROM {source} u WHERE p.row_id = u.row_id"
            f" AND p.hour = u.hour AND {days_in})"
        )
    return out


def run_update(session: Session, rows: list[dict[str, Any]]) -> None:
    """Set the label columns of stored rows (row_id, hour, actual, label_ts, delay_h)."""
    if not rows:
        return
    source = (
        "(SELECT * FROM unnest(%(row)s::int8[], %(hour)s::int4[], %(actual)s::text[],"
        " %(ts)s::timestamptz[], %(delay)s::float8[])"
        " AS v(row_id, hour, actual, label_ts, delay_h))"
    )
    ctes = update_sql(session, (r["hour"] for r in rows), source)
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
