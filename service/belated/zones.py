"""Model time zones: checked IANA names and local day and week boundaries as UTC instants.

Rollups are kept per UTC hour, so a local day must be a whole number of UTC hours: a zone
is accepted only when its offset from UTC is a whole number of hours at every moment the
service can see (from 1970, the Unix epoch, to 2100). Day and week windows start at local
midnight (weeks on Monday); at a daylight-saving change a local day lasts 23 or 25 hours.
Where local midnight does not exist (a zone that springs forward at midnight) the day
starts at the first local instant after the gap.
"""

from __future__ import annotations

import difflib
from datetime import UTC, date, datetime, timedelta, tzinfo
from functools import lru_cache
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError, available_timezones

DEFAULT_ZONE = "UTC"
CHECKED_FROM = datetime(1970, 1, 1, tzinfo=UTC)
CHECKED_UNTIL = datetime(2100, 1, 1, tzinfo=UTC)
MAX_SUGGESTIONS = 3


@lru_cache(maxsize=64)
def zone(name: str) -> tzinfo:
    """The tzinfo of an IANA name (UTC for "UTC"); KeyError when unknown."""
    if name == DEFAULT_ZONE:
        return UTC
    return ZoneInfo(name)


@lru_cache(maxsize=1)
def _names() -> frozenset[str]:
    return frozenset(available_timezones())


@lru_cache(maxsize=256)
def zone_problem(name: str) -> str | None:
    """Why `name` cannot be a model's time zone, or None when it can."""
    if name == DEFAULT_ZONE:
        return None
    if name not in _names():
        near = difflib.get_close_matches(name, sorted(_names()), n=MAX_SUGGESTIONS, cutoff=0.6)
        hint = f"; closest known: {', '.join(near)}" if near else ""
        return f"{name!r} is not an IANA time zone name (such as Europe/Berlin){hint}"
    try:
        tz = ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        return f"{name!r} is not an IANA time zone name (such as Europe/Berlin)"
    odd = _first_odd_offset(tz)
    if odd is not None:
        when, offset = odd
        return (
            f"{name!r} is {_hours(offset)} from UTC (from {when:%Y-%m-%d}); windows are built "
            "from hourly rollups, so a zone's offset must be a whole number of hours at all times"
        )
    return None


def _first_odd_offset(tz: tzinfo) -> tuple[datetime, timedelta] | None:
    """The first day (1970-2100) whose UTC offset is not a whole number of hours, sampled
    daily at 12:00 UTC: any offset in force for a day or more is seen."""
    t = CHECKED_FROM + timedelta(hours=12)
    day = timedelta(days=1)
    while t < CHECKED_UNTIL:
        offset = t.astimezone(tz).utcoffset()
        if offset is not None and offset % timedelta(hours=1):
            return t, offset
        t += day
    return None


def _hours(offset: timedelta) -> str:
    sign = "-" if offset < timedelta(0) else "+"
    seconds = int(abs(offset).total_seconds())
    text = f"{sign}{seconds // 3600:02d}:{seconds // 60 % 60:02d}"
    return text + (f":{seconds % 60:02d}" if seconds % 60 else "")


def local_midnight(day: date, tz: tzinfo) -> datetime:
    """The UTC instant at which the local `day` starts (after the gap, if midnight is in one)."""
    wall = datetime(day.year, day.month, day.day, tzinfo=tz)
    instant = wall.astimezone(UTC)
    # fold=0 in a gap reads the wall time with the offset before the change, which is the
    # instant of the change itself: the first local instant of the day
    return instant


def floor_local(dt: datetime, granularity: str, tz: tzinfo) -> datetime:
    """The UTC start of the local hour, day or week (Monday) containing the instant dt."""
    utc = dt.astimezone(UTC)
    if granularity == "hour":
        return utc.replace(minute=0, second=0, microsecond=0)
    day = utc.astimezone(tz).date()
    if granularity == "week":
        day -= timedelta(days=day.weekday())
    elif granularity != "day":
        raise ValueError(f"unknown granularity {granularity!r}")
    start = local_midnight(day, tz)
    if start > utc:  # dt lies before the first instant of its local day (inside a gap)
        return floor_local(start - timedelta(microseconds=1), granularity, tz)
    return start


def shift(start: datetime, granularity: str, n: int, tz: tzinfo) -> datetime:
    """The window start `n` windows after (or before, n < 0) the aligned `start`."""
    if granularity == "hour":
        return start + n * timedelta(hours=1)
    days = n * (7 if granularity == "week" else 1)
    return local_midnight(start.astimezone(tz).date() + timedelta(days=days), tz)


def local_iso(dt: datetime, tz: tzinfo) -> str:
    """RFC 3339 in the zone's offset (Z for UTC)."""
    if tz is UTC:
        return dt.astimezone(UTC).isoformat().replace("+00:00", "Z")
    return dt.astimezone(tz).isoformat()


def offset_text(dt: datetime, tz: tzinfo) -> str:
    """The zone's offset from UTC at the instant dt, as RFC 3339 writes it: "+01:00"."""
    return _hours(dt.astimezone(tz).utcoffset() or timedelta(0))


def wall_text(dt: datetime, tz: tzinfo, fmt: str = "%Y-%m-%d %H:%M") -> str:
    """The instant dt as a person in the zone reads it: "2026-03-29 03:00 +02:00".

    The offset follows a format with a time of day, so an hour is never ambiguous at a
    daylight-saving change; a date alone is the local date, and in UTC the wall time alone
    (callers keep their own way of saying UTC)."""
    text = dt.astimezone(tz).strftime(fmt)
    if tz is UTC or "%H" not in fmt:
        return text
    return f"{text} {offset_text(dt, tz)}"


def is_utc(name: str | None) -> bool:
    """Whether a model's zone setting is UTC (times are then shown as they always were)."""
    return not name or name == DEFAULT_ZONE
