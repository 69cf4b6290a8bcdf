"""Rows taken from the recorder's queue, grouped into batches per model and kind."""

from __future__ import annotations

import queue
import threading
import time
from typing import Any

from belated.client.spool import Batch

Row = tuple[str, str, dict[str, Any]]  # model, kind, item
POLL = 0.1  # the longest single wait, so that close() is noticed at once


def gather(
    rows: queue.Queue[Row],
    *,
    limit: int,
    wait: bool,
    first_wait: float,
    flush_seconds: float,
    not_after: float,
    stopping: threading.Event,
) -> list[Row]:
    """Up to `limit` rows. When `wait`: up to `first_wait` seconds for the first row, then
    up to `flush_seconds` from it but not past `not_after` (time.monotonic); else, and once
    `stopping` is set, only the rows there now."""
    taken: list[Row] = []
    until: float | None = None  # set when the first row comes
    while len(taken) < limit:
        if not wait or stopping.is_set():
            try:
                taken.append(rows.get_nowait())
            except queue.Empty:
                break
            continue
        left = first_wait if until is None else until - time.monotonic()
        if until is not None and left <= 0:
            break
        try:
            row = rows.get(timeout=min(POLL, max(0.0, left)))
        except queue.Empty:
            if until is None:
                break
            continue
        if until is None:
            until = min(time.monotonic() + flush_seconds, not_after)
        taken.append(row)
    return taken


def batches(taken: list[Row]) -> list[Batch]:
    """The rows as batches, one per model and kind, each in the order recorded."""
    groups: dict[tuple[str, str], list[dict[str, Any]]] = {}
    for model, kind, item in taken:
        groups.setdefault((model, kind), []).append(item)
    return [Batch.of(model, kind, items) for (model, kind), items in groups.items()]
