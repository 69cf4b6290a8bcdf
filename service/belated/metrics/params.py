"""Parse and check the query parameters of the history endpoints."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta, tzinfo

from sqlalchemy.orm import Session

from belated.errors import Invalid, field_error
from belated.stats.fbeta import resolve_beta
from belated.stats.summary import check_measures
from belated.store import tag_names
from belated.store.tables import ModelRow
from belated.timeutil import GRANULARITIES, parse_ts, window_step
from belated.zones import DEFAULT_ZONE, floor_local, shift, zone

MAX_WINDOWS = 10_000
DEFAULT_WINDOWS = 30
INTERVALS = ("wilson", "clopper-pearson", "jeffreys")


@dataclass(frozen=True)
class Range:
    """Aligned window starts [start, end) of one granularity, as UTC instants; day and week
    windows start at midnight in `zone` (an IANA name), so they may last 23 or 25 hours."""

    granularity: str
    start: datetime
    end: datetime
    zone: str = DEFAULT_ZONE

    @property
    def step(self) -> timedelta:
        """The nominal length of one window (a local day may be an hour shorter or longer)."""
        return window_step(self.granularity)

    @property
    def tz(self) -> tzinfo:
        """The tzinfo of the range's zone."""
        return zone(self.zone)

    def bounds(self, lookback: int = 0) -> list[datetime]:
        """Window boundaries from `lookback` windows before `start` to `end`, both included."""
        first = shift(self.start, self.granularity, -lookback, self.tz)
        out = [first]
        while out[-1] < self.end:
            out.append(shift(out[-1], self.granularity, 1, self.tz))
        return out

    def starts(self) -> list[datetime]:
        """Every window start in the range."""
        return self.bounds()[:-1]

    def in_zone(self, name: str) -> Range:
        """The same span aligned to the windows of another zone (the same when it is)."""
        if name == self.zone or self.granularity == "hour":
            return Range(self.granularity, self.start, self.end, name)
        tz = zone(name)
        start = floor_local(self.start, self.granularity, tz)
        end = floor_local(self.end - timedelta(microseconds=1), self.granularity, tz)
        return Range(self.granularity, start, shift(end, self.granularity, 1, tz), name)


def _bad(field: str, reason: str) -> Invalid:
    return Invalid([field_error(None, field, reason)], detail=f"'{field}': {reason}")


def parse_range(
    granularity: str,
    start: str | None,
    end: str | None,
    now: datetime,
    default_windows: int = DEFAULT_WINDOWS,
    time_zone: str = DEFAULT_ZONE,
) -> Range:
    """Align [start, end) down to window boundaries of `time_zone`; default the last 30
    windows to now. A time with an offset is that instant; one without is local wall time."""
    if granularity not in GRANULARITIES:
        raise _bad("granularity", f"must be one of {', '.join(GRANULARITIES)}")
    tz = zone(time_zone)
    end_dt = _aligned("end", end, granularity, tz)
    start_dt = _aligned("start", start, granularity, tz)
    if end_dt is None:
        end_dt = shift(floor_local(now, granularity, tz), granularity, 1, tz)
        if start_dt is not None and start_dt >= end_dt:
            end_dt = shift(start_dt, granularity, 1, tz)
    if start_dt is None:
        start_dt = shift(end_dt, granularity, -default_windows, tz)
    if start_dt >= end_dt:
        raise _bad("start", "must be before 'end' (after aligning both to window boundaries)")
    if (end_dt - start_dt) / window_step(granularity) > MAX_WINDOWS:
        raise _bad("end", f"the range covers more than {MAX_WINDOWS} windows")
    return Range(granularity, start_dt, end_dt, time_zone)


def _aligned(field: str, value: str | None, granularity: str, tz: tzinfo) -> datetime | None:
    if not value:
        return None
    try:
        return floor_local(parse_local(value, tz), granularity, tz)
    except (ValueError, TypeError, OverflowError):
        raise _bad(field, "not an RFC 3339 time") from None


def parse_local(value: str, tz: tzinfo) -> datetime:
    """An instant from RFC 3339 text; without an offset, the wall time in `tz`."""
    text = value.strip()
    if text.endswith(("Z", "z")) or not text:
        return parse_ts(text)
    dt = datetime.fromisoformat(text)
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=tz)
    return dt.astimezone(UTC)


def parse_beta(beta: float | None, precision_weight: float | None) -> float:
    """β from either spelling (β or the precision weight α = 1/(1+β²)), never both."""
    try:
        return resolve_beta(beta, precision_weight)
    except ValueError as exc:
        raise _bad(
            "precision_weight" if precision_weight is not None else "beta", str(exc)
        ) from None


TAG_PREFIX = "tag."


def parse_tag_filters(items: Iterable[tuple[str, str]]) -> tuple[tuple[str, str], ...]:
    """`tag.<key>=<value>` query parameters (other parameters are skipped): one value per
    key, the filters ANDed; returned as (key, value) pairs."""
    out: list[tuple[str, str]] = []
    for name, value in items:
        if not name.startswith(TAG_PREFIX):
            continue
        key = name[len(TAG_PREFIX) :]
        if not key or len(key) > 64:
            raise _bad(name, "a tag key is 1-64 characters: tag.<key>=<value>")
        if not value or len(value) > 64:
            raise _bad(name, "a tag value is 1-64 characters")
        if any(k == key for k, _ in out):
            raise _bad(name, f"the key {key!r} is given twice (one value per key)")
        out.append((key, value))
    return tuple(out)


def check_known_tags(
    session: Session, model: ModelRow, filters: tuple[tuple[str, str], ...]
) -> None:
    """Refuse a filter whose key, or whose value for its key, no prediction of the model
    carries: a 422 naming it and the closest known ones."""
    for key, value in filters:
        reason = tag_names.unknown_filter(session, model, key, value)
        if reason:
            raise _bad(f"{TAG_PREFIX}{key}", reason)


def refuse_segment(query: Iterable[str]) -> None:
    """The old `segment=key:value` filter is gone: say what replaced it."""
    if "segment" in query:
        raise _bad("segment", "not a parameter any more; filter with tag.<key>=<value>")


MULTICLASS_MEASURES = ("accuracy",) + tuple(
    f"{m}_{avg}" for m in ("precision", "recall", "fbeta") for avg in ("macro", "micro", "weighted")
)


def parse_measures(text: str | None, kind: str = "binary") -> frozenset[str] | None:
    """A comma list of measure names of the model's kind, or None for all."""
    if not text:
        return None
    names = [m.strip() for m in text.split(",") if m.strip()]
    if kind == "multiclass":
        unknown = sorted(set(names) - set(MULTICLASS_MEASURES))
        if unknown:
            raise _bad(
                "measures",
                f"unknown measures for a multiclass model: "
                f"{', '.join(unknown)}; choose from {', '.join(MULTICLASS_MEASURES)}",
            )
        return frozenset(names)
    try:
        return check_measures(names)
    except ValueError as exc:
        raise _bad("measures", str(exc)) from None


def check_interval(interval: str, confidence: float, resamples: int) -> None:
    """Refuse an unknown interval method, a confidence outside (0, 1), too many resamples."""
    if interval not in INTERVALS:
        raise _bad("interval", f"must be one of {', '.join(INTERVALS)}")
    if not (0 < confidence < 1):
        raise _bad("confidence", "must lie in (0, 1)")
    if not (1 <= resamples <= 10_000):
        raise _bad("resamples", "must be between 1 and 10000")
