"""A baseline as an alert keeps it: JSON in the alert row, the same baseline read back.

An alert freezes the baseline its first breach was decided against (DESIGN.md, "Rules and
alerts"): the pooled sufficient statistics are stored whole, so a later evaluation compares
with exactly those numbers, whatever happens to the windows they came from.
"""

from __future__ import annotations

from dataclasses import fields
from datetime import datetime
from typing import Any

import numpy as np

from belated.alerts.decide import Baseline
from belated.stats.window import WindowStats
from belated.timeutil import iso, parse_ts


def dump(base: Baseline, value: float | None) -> dict[str, Any]:
    """The stored form: value, period, the windows pooled and their statistics."""
    stats: dict[str, Any] = {}
    for f in fields(WindowStats):
        v = getattr(base.stats, f.name)
        stats[f.name] = v.tolist() if isinstance(v, np.ndarray) else v
    return {
        "value": value,
        "start": iso(base.start),
        "end": iso(base.end),
        "parts": [iso(p) for p in base.parts],
        "fixed": base.fixed,
        "tag_counts": dict(base.tag_counts),
        "stats": stats,
    }


def load(stored: dict[str, Any]) -> Baseline:
    """The baseline back from its stored form."""
    empty = WindowStats.empty()
    values: dict[str, Any] = {}
    for f in fields(WindowStats):
        blank = getattr(empty, f.name)
        got = stored["stats"][f.name]
        values[f.name] = (
            np.asarray(got, dtype=blank.dtype) if isinstance(blank, np.ndarray) else got
        )
    return Baseline(
        stats=WindowStats(**values),
        start=parse_ts(stored["start"]),
        end=parse_ts(stored["end"]),
        parts=tuple(parse_ts(p) for p in stored.get("parts", [])),
        tag_counts={str(k): int(n) for k, n in stored.get("tag_counts", {}).items()},
        fixed=bool(stored.get("fixed")),
    )


def period(stored: dict[str, Any] | None) -> tuple[datetime, datetime] | None:
    """The stored baseline's [start, end), if any."""
    if not stored or "start" not in stored:
        return None
    return parse_ts(stored["start"]), parse_ts(stored["end"])
