"""Parse and check the query parameters of the history endpoints."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime, timedelta

from sqlalchemy.orm import Session

from belated.errors import Invalid, field_error
from belated.stats.fbeta import resolve_beta
from belated.stats.summary import check_measures
from belated.store import tag_names
from belated.store.tables import ModelRow
from belated.timeutil import GRANULARITIES, floor_window, parse_ts, window_step

MAX_WINDOWS = 10_000
DEFAULT_WINDOWS = 30
INTERVALS = ("wilson", "clopper-pearson", "jeffreys")


@dataclass(frozen=True)
class Range:
    """Aligned window starts [start, end) of one granularity."""

    granularity: str
    start: datetime
    end: datetime

    @property
    def step(self) -> timedelta:
        """The length of one window."""
        return window_step(self.granularity)

    def starts(self) -> list[datetime]:
        """Every window start in the range."""
        out, t = [], self.start
        while t < self.end:
            out.append(t)
            t += self.step
        return out


def _bad(field: str, reason: str) -> Invalid:
    return Invalid([field_error(None, field, reason)], detail=f"'{field}': {reason}")


def parse_range(
    granularity: str,
    start: str | None,
    end: str | None,
    now: datetime,
    default_windows: int = DEFAULT_WINDOWS,
) -> Range:
    """Align [start, end) down to window boundaries; default the last 30 windows to now."""
    if granularity not in GRANULARITIES:
        raise _bad("granularity", f"must be one of {', '.join(GRANULARITIES)}")
    step = window_step(granularity)
    end_dt = _aligned("end", end, granularity)
    start_dt = _aligned("start", start, granularity)
    if end_dt is None:
        end_dt = floor_window(now, granularity) + step
        if start_dt is not None and start_dt >= end_dt:
            end_dt = start_dt + step
    if start_dt is None:
        start_dt = end_dt - default_windows * step
    if start_dt >= end_dt:
        raise _bad("start", "must be before 'end' (after aligning both to window boundaries)")
    if (end_dt - start_dt) / step > MAX_WINDOWS:
        raise _bad("end", f"the range covers more than {MAX_WINDOWS} windows")
    return Range(granularity, start_dt, end_dt)


def _aligned(field: str, value: str | None, granularity: str) -> datetime | None:
    if not value:
        return None
    try:
        return floor_window(parse_ts(value), granularity)
    except (ValueError, TypeError, OverflowError):
        raise _bad(field, "not an RFC 3339 time") from None


def parse_beta(beta: float | None, precision_weight: float | None) -> float:
    """β from either spelling (β or the precision weight α = 1/(1+β²)), never both."""
    try:
        return resolve_beta(beta, precision_weight)
    except ValueError as exc:
        raise _bad(
            "precision_weight" if precision_weight is not None else "beta", str(exc)
        ) from None


def parse_segments(values: list[str] | None) -> tuple[tuple[str, str], ...]:
    """`key:value` filters of the dashboard's form; the same key twice is refused. (The API
    takes `tag.<key>=<value>`, see parse_tag_filters.)"""
    out: list[tuple[str, str]] = []
    for raw in values or []:
        key, sep, value = raw.partition(":")
        if not sep or not key or not value or len(key) > 64 or len(value) > 64:
            raise _bad("segment", f"{raw!r} is not key:value")
        if any(k == key for k, _ in out):
            raise _bad("segment", f"the key {key!r} is given twice")
        out.append((key, value))
    return tuple(out)


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
