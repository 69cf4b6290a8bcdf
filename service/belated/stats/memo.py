"""A bounded, thread-safe memo for pure functions of window statistics.

The bootstrap interval of a window depends only on its counts and the options, and the EM
prior only on its histogram and the training prior. Closed windows keep their statistics
while the same year of windows is asked for again and again (dashboards, alert rules), so
the answers are kept by content: a changed window has a different key, nothing goes stale.
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from collections.abc import Hashable
from typing import Any

import numpy as np


class Memo:
    """Least-recently-used map with a size bound."""

    def __init__(self, size: int) -> None:
        self.size = size
        self._data: OrderedDict[Hashable, Any] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: Hashable) -> tuple[bool, Any]:
        """(found, value)."""
        with self._lock:
            if key not in self._data:
                return False, None
            self._data.move_to_end(key)
            return True, self._data[key]

    def put(self, key: Hashable, value: Any) -> None:
        """Keep `value`; the least recently used entry goes when the memo is full."""
        with self._lock:
            self._data[key] = value
            self._data.move_to_end(key)
            while len(self._data) > self.size:
                self._data.popitem(last=False)

    def clear(self) -> None:
        """Forget everything (tests)."""
        with self._lock:
            self._data.clear()


def digest(*arrays: np.ndarray) -> bytes:
    """A 16-byte key for the contents of some arrays (dtype and shape included)."""
    h = hashlib.blake2b(digest_size=16)
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(f"{a.dtype.str}{a.shape}".encode())
        h.update(a.tobytes())
    return h.digest()
