"""UTC parsing and window arithmetic shared by the store, API and jobs."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

HOUR = timedelta(hours=1)
GRANULARITIES = ("hour", "day", "week")


def parse_ts(value: object) -> datetime:
    """Parse RFC 3339 / ISO 8601 (or Unix seconds); a value without an offset is UTC."""
    if isinstance(value, str):  # first: what clients send
        try:  # as it is, a Z included; padding or a lower-case z below
            dt = datetime.fromisoformat(value)
        except ValueError:
            text = value.strip()
            if text.endswith(("Z", "z")):
                text = text[:-1] + "+00:00"
            dt = datetime.fromisoformat(text)
    elif isinstance(value, datetime):
        dt = value
    elif isinstance(value, bool):
        raise ValueError("not a timestamp")
    elif isinstance(value, int | float):
        dt = datetime.fromtimestamp(float(value), UTC)
    else:
        raise ValueError("not a timestamp")
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=UTC)
    return dt if dt.tzinfo is UTC else dt.astimezone(UTC)


def to_utc(dt: datetime) -> datetime:
    """Attach UTC to naive datetimes read back from the store."""
    return dt.replace(tzinfo=UTC) if dt.tzinfo is None else dt.astimezone(UTC)


def floor_hour(dt: datetime) -> datetime:
    """The start of the hour containing dt."""
    return to_utc(dt).replace(minute=0, second=0, microsecond=0)


def floor_window(dt: datetime, granularity: str) -> datetime:
    """The start of the hour, day or ISO week (Monday) containing dt."""
    h = floor_hour(dt)
    if granularity == "hour":
        return h
    d = h.replace(hour=0)
    if granularity == "day":
        return d
    if granularity == "week":
        return d - timedelta(days=d.weekday())
    raise ValueError(f"unknown granularity {granularity!r}")


def window_step(granularity: str) -> timedelta:
    """The length of one window."""
    return {"hour": HOUR, "day": timedelta(days=1), "week": timedelta(days=7)}[granularity]


def iso(dt: datetime) -> str:
    """RFC 3339 with a Z suffix."""
    return to_utc(dt).isoformat().replace("+00:00", "Z")


def from_db(value: datetime | str | None) -> datetime | None:
    """A timestamp read back from either store (SQLite aggregates return text)."""
    if value is None:
        return None
    if isinstance(value, str):
        value = datetime.fromisoformat(value)
    return to_utc(value)
