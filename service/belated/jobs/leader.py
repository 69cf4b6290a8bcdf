"""The leader lock that lets one process run the scheduled jobs.

On PostgreSQL the leader is whoever holds a session-level advisory lock on a dedicated
connection kept open outside the pool (a transaction-level lock on a pooled connection would
be released at once). Every process tries to take it every few seconds, so when the leader
dies its connection closes, the lock is freed and another process takes over. On SQLite there
is one process, which is always the leader.
"""

from __future__ import annotations

import logging
import threading
from typing import Any

from sqlalchemy import Engine

from belated.store.db import is_sqlite

log = logging.getLogger(__name__)
LEADER_LOCK = 0x62656C61_74656401 & 0x7FFFFFFFFFFFFFFF
LEADER_POLL_SECONDS = 2.0


class Leader:
    """Holds (or tries to hold) the jobs leader lock."""

    def __init__(self, engine: Engine) -> None:
        self.url = engine.url
        self.sqlite = is_sqlite(str(engine.url))
        self._conn: Any = None
        self._lock = threading.Lock()

    def _conninfo(self) -> str:
        url = self.url.set(drivername="postgresql")
        return url.render_as_string(hide_password=False)

    def check(self) -> bool:
        """True while this process holds the lock; tries to take it when it does not."""
        if self.sqlite:
            return True
        import psycopg

        with self._lock:
            if self._conn is not None:
                try:
                    self._conn.execute("SELECT 1")
                    return True
                except psycopg.Error:
                    log.warning("lost the jobs leader connection; trying again")
                    self._close()
            try:
                conn = psycopg.connect(self._conninfo(), autocommit=True, connect_timeout=5)
                got = conn.execute("SELECT pg_try_advisory_lock(%s)", (LEADER_LOCK,)).fetchone()
            except psycopg.Error:
                return False
            if got and got[0]:
                self._conn = conn
                log.info("this process now runs the jobs (leader lock taken)")
                return True
            conn.close()
            return False

    @property
    def held(self) -> bool:
        """Whether the lock is held, without trying to take it."""
        return self.sqlite or self._conn is not None

    def _close(self) -> None:
        try:
            if self._conn is not None:
                self._conn.close()
        finally:
            self._conn = None

    def release(self) -> None:
        """Give the lock up (closing the connection frees it)."""
        with self._lock:
            self._close()
