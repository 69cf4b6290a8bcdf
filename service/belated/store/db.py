"""Engines and sessions for SQLite (embedded default) and PostgreSQL."""

from __future__ import annotations

import math
import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import orjson
from sqlalchemy import Engine, create_engine, event
from sqlalchemy.exc import DisconnectionError
from sqlalchemy.orm import Session, sessionmaker


def is_sqlite(engine_or_url: Engine | str) -> bool:
    """True for a SQLite store."""
    url = engine_or_url if isinstance(engine_or_url, str) else str(engine_or_url.url)
    return url.startswith("sqlite")


def make_engine(url: str, *, read_only: bool = False, **kwargs: Any) -> Engine:
    """Create an engine with the settings each store needs for concurrent use; `read_only`
    opens every connection read-only, so that a write fails loudly (`serve --read-only`)."""
    if is_sqlite(url):
        # JSON is written as UTF-8 (not ASCII escapes) so that json_extract paths match keys
        # such as 'région' as sent
        engine = create_engine(
            read_only_sqlite_url(url) if read_only else url,
            connect_args={"check_same_thread": False, "timeout": 30},
            json_serializer=lambda obj: orjson.dumps(obj).decode(),
            **kwargs,
        )
        _configure_sqlite(engine, read_only=read_only)
        return engine
    # per-row id lookups and updates want index plans; the default random_page_cost of 4
    # (spinning disks) makes the planner hash-join whole tables instead. No JIT: a label
    # batch over 60 day partitions is one statement of about 130 CTEs, costed above JIT's
    # thresholds once the days hold 14,000 rows each, and compiling its 1,757 functions took
    # 18.6 of its 19.3 s (auto_explain, 5M predictions); the statement itself ran in 0.7 s
    options = "-c random_page_cost=1.1 -c jit=off"
    if read_only:  # a hot standby refuses writes anyway; a primary must refuse them too
        options += " -c default_transaction_read_only=on"
    kwargs.setdefault("connect_args", {"options": options})
    kwargs.setdefault("pool_size", 10)
    kwargs.setdefault("max_overflow", 20)
    engine = create_engine(url, **kwargs)
    _ping_when_idle(engine)
    return engine


IDLE_PING_SECONDS = 1.0


def _ping_when_idle(engine: Engine) -> None:
    """Check a pooled connection before use only when it has sat idle for a while.

    A connection back in the pool a moment ago is alive (a round trip per request would
    cost a small request a fifth of its time); one idle for longer may have been cut by a
    restart of the store, and is replaced when the ping fails. A connection that breaks in
    use is detected by SQLAlchemy, which then drops every connection pooled before it.
    """

    @event.listens_for(engine, "checkin")
    def _on_checkin(_dbapi_conn: Any, record: Any) -> None:
        record.info["checked_in"] = time.monotonic()

    @event.listens_for(engine, "checkout")
    def _on_checkout(dbapi_conn: Any, record: Any, _proxy: Any) -> None:
        last = record.info.get("checked_in")
        if last is not None and time.monotonic() - last < IDLE_PING_SECONDS:
            return
        try:
            alive = engine.dialect.do_ping(dbapi_conn)
        except Exception as exc:
            raise DisconnectionError("the pooled connection is gone") from exc
        if not alive:
            raise DisconnectionError("the pooled connection is gone")


def read_only_sqlite_url(url: str) -> str:
    """The same SQLite file opened with `mode=ro`: a write fails, and no file is created."""
    path = url.split(":///", 1)[1] if ":///" in url else ""
    if not path or path.startswith(("file:", ":memory:")):
        raise ValueError("a read-only SQLite store needs a file path (sqlite:///path/to.db)")
    path, _, query = path.partition("?")
    extra = f"&{query}" if query else ""
    return f"sqlite:///file:{path}?mode=ro&uri=true{extra}"


def _configure_sqlite(engine: Engine, *, read_only: bool = False) -> None:
    """WAL, a busy timeout, foreign keys, and BEGIN IMMEDIATE for every transaction.

    A deferred transaction that reads then writes fails with SQLITE_BUSY_SNAPSHOT whatever
    the timeout, so every transaction takes the write lock up front; SQLite serialises
    writers anyway. A read-only engine never writes: its deferred BEGIN leaves the write
    lock to the process that writes.
    """

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn: Any, _record: Any) -> None:
        dbapi_conn.isolation_level = None  # we issue BEGIN ourselves
        cur = dbapi_conn.cursor()
        if not read_only:  # a reader takes the journal mode the writer chose
            cur.execute("PRAGMA journal_mode=WAL")
        cur.execute("PRAGMA busy_timeout=30000")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute("PRAGMA synchronous=NORMAL")
        try:
            cur.execute("SELECT ln(1.0), floor(1.5)")
        except Exception:  # a SQLite built without its math functions
            dbapi_conn.create_function("ln", 1, math.log, deterministic=True)
            dbapi_conn.create_function("floor", 1, math.floor, deterministic=True)
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Any) -> None:
        conn.exec_driver_sql("BEGIN" if read_only else "BEGIN IMMEDIATE")


def make_sessionmaker(engine: Engine, *, stale_ok: bool = False) -> sessionmaker[Session]:
    """Sessions that keep loaded objects usable after commit; `stale_ok` sessions read the
    rollups as they are, never refreshing first (a read-only replica, metrics/load.py)."""
    return sessionmaker(bind=engine, expire_on_commit=False, info={STALE_OK: stale_ok})


STALE_OK = "stale_ok"


@contextmanager
def transaction(factory: sessionmaker[Session]) -> Iterator[Session]:
    """One unit of work: commit on success, roll back on error."""
    session = factory()
    try:
        yield session
        session.commit()
    except BaseException:
        session.rollback()
        raise
    finally:
        session.close()
