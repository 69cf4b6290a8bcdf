"""Fixtures for alert tests: a frozen clock and a job runner on the test store."""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime
from typing import Any

import pytest

from belated.clock import clock
from belated.jobs import JobRunner


@pytest.fixture()
def frozen() -> Iterator[Any]:
    """The service clock, frozen at 2026-11-15 12:00 UTC and released afterwards."""
    clock.set(datetime(2026, 11, 15, 12, tzinfo=UTC))
    yield clock
    clock.set(None)


@pytest.fixture()
def runner(engine: Any, settings: Any) -> Iterator[JobRunner]:
    """A job runner on the test store (started by the tests that want the scheduler)."""
    settings = settings.model_copy(update={"refresh_seconds": 0.3})
    r = JobRunner(engine=engine, settings=settings)
    yield r
    if r.scheduler.running:
        r.stop()
    else:
        r.leader.release()  # a test that ran ticks by hand holds the PostgreSQL lock too
