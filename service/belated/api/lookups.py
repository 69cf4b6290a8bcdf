"""Short-lived caches of the look-ups every ingest request makes: its token and its model.

A live system posts many small requests; reading the token and the model from the store for
each one doubles the round trips of a one-prediction request. Entries live at most
`TTL_SECONDS`, and a revocation, a model change or a model deletion clears them the moment
its transaction commits, in this process. Other API processes (`serve --workers N`) see
the change within `TTL_SECONDS`.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Generic, TypeVar

from sqlalchemy.orm import Session

from belated.ingest.validate import ModelSpec
from belated.store.keys import Principal

TTL_SECONDS = 1.0
MAX_ENTRIES = 10_000
K = TypeVar("K")
V = TypeVar("V")


@dataclass(frozen=True, slots=True)
class ModelRef:
    """What an ingest request needs of its model: its row id and its validation spec."""

    id: int
    name: str
    spec: ModelSpec
    source: str = "http"  # "lake": takes rollup uploads, no predictions or labels


class Ttl(Generic[K, V]):
    """A thread-safe map whose entries expire `ttl` seconds after they were loaded."""

    def __init__(self, ttl: float = TTL_SECONDS, max_entries: int = MAX_ENTRIES) -> None:
        self.ttl = ttl
        self.max_entries = max_entries
        self._lock = threading.Lock()
        self._entries: dict[K, tuple[float, V]] = {}
        self._generation = 0

    def peek(self, key: K) -> V | None:
        """The cached value, or None when there is none or it has expired."""
        now = time.monotonic()
        with self._lock:
            hit = self._entries.get(key)
        return hit[1] if hit is not None and now - hit[0] < self.ttl else None

    def get(self, key: K, load: Callable[[], V | None]) -> V | None:
        """The cached value, or `load()`'s (a None from `load` is not kept)."""
        now = time.monotonic()
        with self._lock:
            hit = self._entries.get(key)
            if hit is not None and now - hit[0] < self.ttl:
                return hit[1]
            generation = self._generation
        value = load()
        if value is not None:
            with self._lock:
                # a clear while this loaded may have made the value stale: do not keep it
                if generation == self._generation:
                    if len(self._entries) >= self.max_entries:
                        self._entries.clear()
                    self._entries[key] = (now, value)
        return value

    def clear(self) -> None:
        """Forget every entry."""
        with self._lock:
            self._entries.clear()
            self._generation += 1


class Lookups:
    """The application's caches."""

    def __init__(self) -> None:
        self.tokens: Ttl[str, Principal] = Ttl()
        self.models: Ttl[tuple[int, str], ModelRef] = Ttl()

    def clear_after_commit(self, session: Session) -> None:
        """Clear every cache when `session` commits (a token revoked, a model changed)."""
        hooks: list[Callable[[], None]] = session.info.setdefault("after_commit", [])
        hooks.append(self.clear)
        # before the commit too: a read in flight must not keep what is being changed
        self.clear()

    def clear(self) -> None:
        """Forget every cached token and model."""
        self.tokens.clear()
        self.models.clear()
