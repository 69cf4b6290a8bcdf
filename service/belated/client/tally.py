"""The recorder's counts, shared by the callers' threads and the sending thread."""

from __future__ import annotations

import threading
from dataclasses import dataclass


@dataclass(slots=True)
class Tally:
    """Rows by where they are; read and written under `lock`."""

    lock: threading.Lock
    in_hand: int = 0  # taken from the queue by the sending thread, not yet sent or spooled
    sent: int = 0
    spilled: int = 0
    spooled: int = 0
    dropped: int = 0
    rejected: int = 0
    last_error: str | None = None

    def drop(self, rows: int, error: str | None = None) -> None:
        """Count rows lost (queue and spool full, bad arguments, closed)."""
        with self.lock:
            self.dropped += rows
            if error is not None:
                self.last_error = error
