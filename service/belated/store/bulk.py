"""Bulk primitives with a fast path per store: id lookups, and staging through COPY on PostgreSQL.

psycopg binds at most 65,535 parameters per statement, so PostgreSQL gets arrays (`= ANY`)
and COPY; SQLite gets chunked IN lists and executemany inside its single writer.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping, Sequence
from datetime import UTC, datetime
from typing import Any

import orjson
from psycopg.pq import TransactionStatus
from psycopg.types.string import BytesBinaryDumper
from sqlalchemy import ColumnElement, String, any_, bindparam
from sqlalchemy.dialects.postgresql import ARRAY
from sqlalchemy.orm import InstrumentedAttribute, Session

from belated.store.dialect import is_postgres

SQLITE_CHUNK = 5000
SMALL_ROWS = 1000  # up to this many rows, arrays in one statement beat COPY


def id_filters(
    session: Session, column: InstrumentedAttribute[str], ids: Sequence[str]
) -> Iterator[ColumnElement[bool]]:
    """Filters that together match `column` against every id (one on PostgreSQL)."""
    if is_postgres(session):
        yield column == any_(bindparam("ids_" + column.key, list(ids), type_=ARRAY(String)))
        return
    for start in range(0, len(ids), SQLITE_CHUNK):
        yield column.in_(list(ids[start : start + SQLITE_CHUNK]))


def json_text(value: Any) -> str | None:
    """JSON for a staging column (None stays SQL NULL)."""
    return None if value is None else orjson.dumps(value).decode()


def copy_rows(
    session: Session,
    table: str,
    columns: Sequence[str],
    rows: Iterable[Sequence[Any]],
    types: Sequence[str] | None = None,
) -> None:
    """COPY rows into a table on the session's own connection (PostgreSQL only).

    With `types` (PostgreSQL type names, one per column) the binary format is used: no
    text escaping, which matters for bytea.
    """
    raw = session.connection().connection.driver_connection
    assert raw is not None
    cols = ", ".join(columns)
    binary = " (FORMAT BINARY)" if types else ""
    with raw.cursor() as cur, cur.copy(f"COPY {table} ({cols}) FROM STDIN{binary}") as copy:
        if types:
            if "bytea" in types:
                # set_types finds a dumper by type oid, and the last one registered for
                # bytea is that of psycopg's DB-API `Binary` wrapper, written in Python;
                # plain bytes take the compiled one (a third of the formatting time of a
                # prediction row, which carries two pre-encoded jsonb fields as bytea)
                raw.adapters.register_dumper(bytes, BytesBinaryDumper)
            copy.set_types(list(types))
        for row in rows:
            copy.write_row(row)


def fetch_binary(session: Session, sql: str, params: Sequence[Any]) -> list[Any]:
    """Rows (named tuples) of a query with results in binary format (PostgreSQL only)."""
    from psycopg.rows import namedtuple_row

    raw = session.connection().connection.driver_connection
    assert raw is not None
    with raw.cursor(binary=True, row_factory=namedtuple_row) as cur:
        return list(cur.execute(sql, params).fetchall())


def temp_table(session: Session, name: str, ddl_columns: str) -> None:
    """Create a per-connection staging table that empties itself at commit."""
    raw = session.connection().connection.driver_connection
    assert raw is not None
    with raw.cursor() as cur:
        cur.execute(f"CREATE TEMP TABLE IF NOT EXISTS {name} ({ddl_columns}) ON COMMIT DELETE ROWS")
        cur.execute(f"TRUNCATE {name}")


def execute_binary(session: Session, sql: str, params: Sequence[Any] | Mapping[str, Any]) -> None:
    """Run one statement on the session's connection with its parameters sent in binary
    (PostgreSQL only): arrays cost a sixth of their text form to send."""
    raw = session.connection().connection.driver_connection
    assert raw is not None
    with raw.cursor() as cur:
        cur.execute(sql, params, prepare=True)


def execute_opening(cur: Any, sql: str, params: Mapping[str, Any]) -> Any:
    """Run `sql` (prepared) on a psycopg cursor; when it opens the transaction, its BEGIN
    goes in the same round trip (pipeline mode) rather than one of its own. The rows are
    read from the cursor afterwards, as usual."""
    conn = cur.connection
    if conn.info.transaction_status == TransactionStatus.IDLE and not conn.autocommit:
        with conn.pipeline():
            cur.execute(sql, params, prepare=True)
        return cur
    return cur.execute(sql, params, prepare=True)


def fetch_all(session: Session, sql: str, params: Mapping[str, Any]) -> list[Any]:
    """The rows of one query on the session's connection, parameters in binary
    (PostgreSQL only)."""
    raw = session.connection().connection.driver_connection
    assert raw is not None
    with raw.cursor() as cur:
        return list(cur.execute(sql, params, prepare=True).fetchall())


def insert_rows(
    session: Session,
    table: str,
    columns: Sequence[str],
    types: Sequence[str],
    rows: Sequence[Sequence[Any]],
) -> None:
    """Insert rows (PostgreSQL only): a few as arrays in one statement, many by COPY."""
    if len(rows) > SMALL_ROWS:
        copy_rows(session, table, columns, rows, types)
        return
    arrays = ", ".join(f"%b::{t}[]" for t in types)
    execute_binary(
        session,
        f"INSERT INTO {table} ({', '.join(columns)}) SELECT * FROM unnest({arrays})",
        [list(col) for col in zip(*rows, strict=True)],
    )


# SQLite through its DBAPI cursor. SQLAlchemy's executemany compiles the parameters of every
# row (type processors, ORM bookkeeping): for a 10,000-row label batch that cost about four
# times the inserts themselves. These write and read values in the same form the column
# types do: times as UTC 'YYYY-MM-DD HH:MM:SS.ffffff' text, JSON columns as JSON text
# (None as 'null', as SQLAlchemy's JSON type stores it).


def sqlite_time(value: datetime | None) -> str | None:
    """A UTC time as SQLAlchemy's SQLite DateTime stores it (None stays NULL)."""
    if value is None:
        return None
    if value.utcoffset():
        value = value.astimezone(UTC)
    return value.replace(tzinfo=None).isoformat(" ", "microseconds")


def sqlite_json(value: Any) -> str:
    """A JSON column's value as SQLAlchemy's JSON type stores it on SQLite."""
    return orjson.dumps(value).decode()


def sqlite_executemany(
    session: Session, sql: str, rows: Iterable[Sequence[Any]], times: Sequence[int] = ()
) -> None:
    """Run one statement per row on the session's SQLite connection (qmark parameters);
    the values at the positions `times` are datetimes, converted as the column type would.
    JSON values must come as sqlite_json text."""
    raw = session.connection().connection.driver_connection
    assert raw is not None
    if times:
        rows = (_with_times(row, times) for row in rows)
    raw.executemany(sql, rows)


def _with_times(row: Sequence[Any], times: Sequence[int]) -> list[Any]:
    out = list(row)
    for i in times:
        out[i] = sqlite_time(out[i])
    return out


def sqlite_insert(
    session: Session,
    table: str,
    columns: Sequence[str],
    rows: Iterable[Sequence[Any]],
    times: Sequence[str] = (),
) -> None:
    """Insert rows into a table (SQLite only) through the DBAPI cursor; `times` names the
    datetime columns."""
    marks = ", ".join("?" for _ in columns)
    sql = f"INSERT INTO {table} ({', '.join(columns)}) VALUES ({marks})"
    sqlite_executemany(session, sql, rows, [columns.index(c) for c in times])


def sqlite_read_time(text: str | None) -> datetime | None:
    """A stored SQLite time read back as an aware UTC datetime."""
    return None if text is None else datetime.fromisoformat(text).replace(tzinfo=UTC)
