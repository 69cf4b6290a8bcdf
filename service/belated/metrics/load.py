"""Load the totals of a range: from rollups, or from raw rows for several tags at once."""

from __future__ import annotations

from collections import defaultdict
from datetime import datetime

from sqlalchemy import and_, or_, select
from sqlalchemy.orm import Session

from belated.store import refresh, rollups, segments
from belated.store.db import STALE_OK
from belated.store.rollup_tables import Rollup
from belated.store.tables import ModelRow
from belated.store.totals import Totals


def epoch_hour(dt: datetime) -> int:
    """Whole hours since the Unix epoch."""
    return int(dt.timestamp() // 3600)


def ensure_fresh(session: Session, model: ModelRow, lo: int, hi: int, max_values: int) -> None:
    """Read-your-writes: join raced pending labels, mark hours whose predictions crossed
    `negative_after_days` by now, and refresh the model's dirty buckets in [lo, hi).

    Not in a stale-ok session (a read-only replica): a hot standby refuses the refresh's
    locks and writes, and its answers say how stale they are instead."""
    if session.info.get(STALE_OK):
        return
    refresh.join_and_mark_model(session, model)
    # one transaction takes its locks in ascending hour order, as writers mark them, so a
    # read and a writer never wait on each other in a cycle
    while claimed := refresh.refresh_batch(
        session, max_values=max_values, model_id=model.id, lo=lo, hi=hi
    ):
        lo = max(mark.hour for mark in claimed) + 1


def _rollup_segment(
    session: Session, model: ModelRow, filters: tuple[tuple[str, str], ...]
) -> tuple[str, str] | None:
    """The rollup segment answering `filters`, or None when raw rows must answer."""
    if not filters:
        return "", ""
    if len(filters) > 1:
        return None
    key, value = filters[0]
    admitted = segments.admitted(session=session, model_id=model.id)
    if key in admitted and (value in admitted[key] or value == segments.OTHER):
        return key, value
    return None


def load_totals(
    session: Session,
    model: ModelRow,
    *,
    level: str,
    lo: int,
    hi: int,
    filters: tuple[tuple[str, str], ...],
    now: datetime,
    delays: bool = True,
) -> dict[int, Totals]:
    """Totals of the hourly (`level` 'h') or daily ('d') rows over [lo, hi), keyed by the
    row's start hour;
    `delays=False` leaves out the label-delay bins (the windows do not use them)."""
    seg = _rollup_segment(session, model, filters)
    if seg is None:
        return _from_raw(session, model, level=level, lo=lo, hi=hi, filters=filters, now=now)
    lo_q = lo - lo % 24 if level == "d" else lo
    rows = session.execute(
        select(Rollup.__table__).where(
            Rollup.model_id == model.id,
            Rollup.level == level,
            Rollup.start >= lo_q,
            Rollup.start < hi,
            Rollup.seg_key == seg[0],
            Rollup.seg_value == seg[1],
        )
    )
    # the band delays serve the arrival curves only, which read their own rows
    skip = frozenset({"delays_by_band"}) | (frozenset() if delays else frozenset({"delays"}))
    return {row.start: Totals.from_row(row, skip) for row in rows}


def load_hour_spans(
    session: Session,
    model: ModelRow,
    *,
    spans: list[tuple[int, int]],
    filters: tuple[tuple[str, str], ...],
    now: datetime,
    delays: bool = True,
) -> dict[int, Totals]:
    """Totals of the hourly rows in each [lo, hi) of `spans` (disjoint), keyed by hour, in
    one query (from raw rows, span by span, when the filters need them)."""
    if not spans:
        return {}
    seg = _rollup_segment(session, model, filters)
    if seg is None:
        out: dict[int, Totals] = {}
        for lo, hi in spans:
            out.update(_from_raw(session, model, level="h", lo=lo, hi=hi, filters=filters, now=now))
        return out
    rows = session.execute(
        select(Rollup.__table__).where(
            Rollup.model_id == model.id,
            Rollup.level == "h",
            or_(*(and_(Rollup.start >= lo, Rollup.start < hi) for lo, hi in spans)),
            Rollup.seg_key == seg[0],
            Rollup.seg_value == seg[1],
        )
    )
    # the band delays serve the arrival curves only, which read their own rows
    skip = frozenset({"delays_by_band"}) | (frozenset() if delays else frozenset({"delays"}))
    return {row.start: Totals.from_row(row, skip) for row in rows}


def _from_raw(
    session: Session,
    model: ModelRow,
    *,
    level: str,
    lo: int,
    hi: int,
    filters: tuple[tuple[str, str], ...],
    now: datetime,
) -> dict[int, Totals]:
    """The same statistics aggregated by SQL over raw rows with every tag filter applied."""
    scope = rollups.scope_of(model, range(lo, hi), now).filtered(filters)
    hourly = rollups.compute(session, scope, {})
    out: dict[int, Totals] = defaultdict(Totals)
    for (hour, key, _value), totals in hourly.items():
        if key == "":
            out[hour - hour % 24 if level == "d" else hour].add(totals)
    return dict(out)


def segment_counts(
    session: Session, model: ModelRow, *, key: str, level: str, lo: int, hi: int
) -> dict[int, dict[str, int]]:
    """Predictions per admitted value of one tag key, by row start (for tag PSI)."""
    out: dict[int, dict[str, int]] = defaultdict(dict)
    lo_q = lo - lo % 24 if level == "d" else lo
    for start, value, n in session.execute(
        select(Rollup.start, Rollup.seg_value, Rollup.__table__.c.n_pred).where(
            Rollup.model_id == model.id,
            Rollup.level == level,
            Rollup.start >= lo_q,
            Rollup.start < hi,
            Rollup.seg_key == key,
        )
    ):
        out[start][value] = int(n)
    return dict(out)
