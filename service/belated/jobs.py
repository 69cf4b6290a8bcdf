"""Scheduled jobs (APScheduler 3) and the leader lock that lets one process run them.

On PostgreSQL the leader is whoever holds a session-level advisory lock on a dedicated
connection kept open outside the pool (a transaction-level lock on a pooled connection would
be released at once). Every process tries to take it every few seconds, so when the leader
dies its connection closes, the lock is freed and another process takes over. On SQLite there
is one process, which is always the leader.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from typing import Any

from apscheduler.schedulers.background import BackgroundScheduler
from sqlalchemy import Engine

from belated.config import Settings
from belated.store import refresh
from belated.store.db import is_sqlite, make_sessionmaker

log = logging.getLogger(__name__)
LEADER_LOCK = 0x62656C61_74656401 & 0x7FFFFFFFFFFFFFFF
LEADER_POLL_SECONDS = 2.0
Step = Callable[[Any], dict[str, Any] | None]


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


class JobRunner:
    """The scheduler of one process: refresh, then the steps that follow it."""

    def __init__(
        self, *, engine: Engine, settings: Settings, steps: list[tuple[str, Step]] | None = None
    ) -> None:
        self.engine = engine
        self.settings = settings
        self.sessions = make_sessionmaker(engine)
        self.leader = Leader(engine)
        self.steps = steps if steps is not None else default_steps()
        self.scheduler = BackgroundScheduler(timezone="UTC")
        # a run still going when the next is due is skipped by design (max_instances=1)
        logging.getLogger("apscheduler.scheduler").setLevel(logging.ERROR)
        self.runs = 0
        self.last: dict[str, Any] = {}
        self._run_lock = threading.Lock()

    def is_leader(self) -> bool:
        """Whether this process runs the jobs now."""
        return self.leader.held

    def start(self) -> None:
        """Schedule the jobs and start the scheduler thread."""
        period = self.settings.refresh_seconds
        self.scheduler.add_job(
            self.tick,
            "interval",
            seconds=period,
            id="belated.refresh",
            replace_existing=True,
            coalesce=True,
            max_instances=1,
            misfire_grace_time=max(30, int(period * 2)),
            next_run_time=_soon(),
        )
        self.scheduler.add_job(
            self.leader.check,
            "interval",
            seconds=LEADER_POLL_SECONDS,
            id="belated.leader",
            replace_existing=True,
            coalesce=True,
            max_instances=1,
            misfire_grace_time=30,
        )
        self.scheduler.start()

    def stop(self) -> None:
        """Stop the scheduler and give up the leader lock."""
        try:
            self.scheduler.shutdown(wait=True)
        finally:
            self.leader.release()

    def tick(self) -> dict[str, Any] | None:
        """One run of the jobs, if this process is the leader; errors are logged, not raised."""
        if not self.leader.check():
            return None
        with self._run_lock:
            started = time.monotonic()
            summary: dict[str, Any] = {}
            for name, step in self.steps:
                t0 = time.monotonic()
                try:
                    result = step(self)
                    summary[name] = result or {}
                except Exception:  # a failing step must not stop the others or the schedule
                    log.exception("job step %s failed", name)
                    summary[name] = {"error": True}
                summary[name]["seconds"] = round(time.monotonic() - t0, 4)
            summary["seconds"] = round(time.monotonic() - started, 4)
            self.runs += 1
            self.last = summary
            try:
                refresh.record_run(self.sessions, summary)
            except Exception:
                log.exception("could not record the job run")
            return summary


def refresh_step(runner: JobRunner) -> dict[str, Any]:
    """Join pending labels, mark crossed implied negatives, recompute dirty buckets."""
    marked = refresh.join_and_mark(runner.sessions)
    done = refresh.refresh_all(runner.sessions, max_values=runner.settings.max_segment_values)
    return {"marked": marked, "buckets": done}


def default_steps() -> list[tuple[str, Step]]:
    """Refresh, then the alert evaluation and webhook delivery when they are installed."""
    steps: list[tuple[str, Step]] = [("refresh", refresh_step)]
    try:
        from belated.alerts import jobsteps
    except ModuleNotFoundError as exc:
        if exc.name not in ("belated.alerts.jobsteps",):
            raise
        return steps
    steps.extend(jobsteps.STEPS)
    return steps


def _soon() -> datetime:
    """The first run comes right away rather than after one period (scheduler wall time)."""
    return datetime.now(UTC) + timedelta(milliseconds=200)
