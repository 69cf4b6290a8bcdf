"""The scheduler of one process (APScheduler 3): a run of the steps every refresh period,
when this process is the leader, and a poll of the leader lock."""

from __future__ import annotations

import logging
import threading
import time
from datetime import UTC, datetime, timedelta
from typing import Any

from apscheduler.schedulers.background import BackgroundScheduler
from sqlalchemy import Engine

from belated.config import Settings
from belated.jobs.leader import LEADER_POLL_SECONDS, Leader
from belated.jobs.steps import STEPS, Step
from belated.store import refresh
from belated.store.db import make_sessionmaker

log = logging.getLogger(__name__)


class JobRunner:
    """The scheduler of one process: refresh, then the steps that follow it."""

    def __init__(
        self, *, engine: Engine, settings: Settings, steps: list[tuple[str, Step]] | None = None
    ) -> None:
        self.engine = engine
        self.settings = settings
        self.sessions = make_sessionmaker(engine)
        self.leader = Leader(engine)
        self.steps = steps if steps is not None else list(STEPS)
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


def _soon() -> datetime:
    """The first run comes right away rather than after one period (scheduler wall time)."""
    return datetime.now(UTC) + timedelta(milliseconds=200)
