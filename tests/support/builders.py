"""Small builders of test data: times, predictions, labels, tags and scores maps.

The furniture shop scenario: each prediction says whether an order will be returned; the
positive class "1" is "returned". Times are relative to the real clock, in the recent past,
because the service refuses prediction times more than a day ahead of its own clock.
"""

from __future__ import annotations

import secrets
from datetime import UTC, datetime, timedelta
from typing import Any


def utcnow() -> datetime:
    """The real current time, UTC."""
    return datetime.now(UTC)


def base_time() -> datetime:
    """The start of the hour two days ago: a safe, recent prediction time."""
    return (utcnow() - timedelta(days=2)).replace(minute=0, second=0, microsecond=0)


def stamp(dt: datetime) -> str:
    """RFC 3339 with a Z suffix."""
    return dt.astimezone(UTC).isoformat().replace("+00:00", "Z")


def epoch_hour(dt: datetime) -> int:
    """Whole hours since the Unix epoch (the bucket key the store uses)."""
    return int(dt.timestamp() // 3600)


def unique_name(prefix: str = "returns") -> str:
    """A model name no other test uses."""
    return f"{prefix}-{secrets.token_hex(4)}"


def score_of(n: int) -> float:
    """A deterministic score in [0, 1) that spreads over the range."""
    return (n * 37 % 100) / 100


def prediction(
    n: int, *, base: datetime | None = None, prefix: str = "order", **fields: Any
) -> dict[str, Any]:
    """Prediction number n: id `<prefix>-<n>`, one minute after the previous one."""
    when = (base or base_time()) + timedelta(minutes=n)
    item: dict[str, Any] = {"id": f"{prefix}-{n}", "ts": stamp(when), "score": score_of(n)}
    item.update(fields)
    return item


def predictions(
    count: int,
    *,
    start: int = 0,
    base: datetime | None = None,
    prefix: str = "order",
    **fields: Any,
) -> list[dict[str, Any]]:
    """`count` consecutive predictions."""
    base = base or base_time()
    return [prediction(n, base=base, prefix=prefix, **fields) for n in range(start, start + count)]


def label(pid: str, actual: str | int, ts: datetime | None = None) -> dict[str, Any]:
    """A label; without `ts` the service stamps the time it receives it."""
    item: dict[str, Any] = {"id": pid, "actual": actual}
    if ts is not None:
        item["ts"] = stamp(ts)
    return item


def outcome_of(n: int) -> str:
    """A deterministic true class for prediction n (returned for high scores, mostly)."""
    return "1" if score_of(n) >= 0.6 or n % 7 == 0 else "0"


def tags(count: int, *, key_len: int = 6, value_len: int = 5) -> dict[str, str]:
    """`count` distinct tags with keys and values of the given lengths."""
    return {(f"k{i}-" + "x" * key_len)[:key_len]: "v" * value_len for i in range(count)}


def three_class_scores(top: str, p_top: float, classes: tuple[str, ...]) -> dict[str, float]:
    """A scores map where `top` gets p_top and the rest share the remainder equally."""
    rest = (1.0 - p_top) / (len(classes) - 1)
    return {c: (p_top if c == top else rest) for c in classes}
