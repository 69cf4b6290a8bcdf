"""In-process counters of the service itself (served by /metrics without a token)."""

from __future__ import annotations

import threading
from collections import Counter


class Counters:
    """Thread-safe monotonically increasing counters."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._values: Counter[str] = Counter()

    def add(self, name: str, amount: int = 1) -> None:
        """Increase a counter."""
        with self._lock:
            self._values[name] += amount

    def snapshot(self) -> dict[str, int]:
        """A copy of every counter."""
        with self._lock:
            return dict(self._values)
