"""The one clock of the service: tests set it, code never calls datetime.now() directly."""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime


class Clock:
    """A settable source of the current UTC time."""

    def __init__(self, source: Callable[[], datetime] | None = None) -> None:
        self._source = source or (lambda: datetime.now(UTC))
        self._fixed: datetime | None = None

    def now(self) -> datetime:
        """The current time, timezone-aware UTC."""
        return self._fixed if self._fixed is not None else self._source()

    def set(self, when: datetime | None) -> None:
        """Freeze the clock at `when` (None lets it run again)."""
        if when is not None and when.tzinfo is None:
            raise ValueError("clock times must be timezone-aware")
        self._fixed = when.astimezone(UTC) if when is not None else None


clock = Clock()


def now() -> datetime:
    """The current UTC time from the process clock."""
    return clock.now()
