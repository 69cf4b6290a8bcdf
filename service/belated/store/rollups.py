"""Recompute rollups of chosen hours from raw rows, and the daily rows above them."""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Sequence
from datetime import datetime, timedelta

from sqlalchemy import and_, delete, insert, select, text
from sqlalchemy.orm import Session

from belated.store import rollup_sql as q
from belated.store import segments
from belated.store.accumulate import Acc, cell_key
from belated.store.packing import unpack_delays
from belated.store.rollup_tables import Rollup
from belated.store.tables import ModelRow

Key = tuple[int, str, str]  # (start hour, segment key, segment value)


def scope_of(model: ModelRow, hours: Sequence[int], now: datetime) -> q.Scope:
    """The query scope of a model's hours at time `now`."""
    binary = model.kind == "binary"
    pos = model.positive or model.classes[-1]
    neg = next((c for c in model.classes if c != pos), "")
    cutoff = None
    if model.negative_after_days is not None:
        cutoff = now - timedelta(days=model.negative_after_days)
    return q.Scope(model.id, binary, pos, neg, list(hours), cutoff)


def compute(
    session: Session, scope: q.Scope, keys: dict[str, list[str]]
) -> dict[Key, Acc]:
    """Aggregate the scope's raw rows into accumulators per (hour, segment)."""
    accs: dict[Key, Acc] = defaultdict(Acc)
    for key in [None, *keys]:
        values = keys.get(key, []) if key else []
        skey = key or ""
        for row in q.scalars(session, scope, key, values):
            accs[(row[0], skey, row[1])].set_scalars(row[2:])
        if scope.binary:
            for hour, seg, cls, bin_, n, ssum in q.histograms(session, scope, key, values):
                acc = accs[(hour, skey, seg)]
                acc.hist[cls, bin_] += n
                acc.hsum[cls, bin_] += ssum or 0.0
        else:
            for hour, seg, actual, predicted, n in q.cells(session, scope, key, values):
                acc = accs[(hour, skey, seg)]
                acc.cells = acc.cells or {}
                acc.cells[cell_key(actual, predicted)] = int(n)
    for hour, bin_, n in q.delays(session, scope):
        acc = accs[(hour, "", "")]
        if acc.delays is None:
            acc.delays = unpack_delays(None)
        acc.delays[bin_] += n
    return accs


def refresh_hours(
    *, session: Session, model: ModelRow, hours: Sequence[int], now: datetime,
    max_values: int,
) -> int:
    """Recompute the hourly rollups of `hours` and the daily rows of their days."""
    hours = sorted(set(hours))
    if not hours:
        return 0
    keys = segments.admit(session=session, model=model, hours=hours, max_values=max_values)
    accs = compute(session, scope_of(model, hours, now), keys)
    _replace(session, model.id, "h", hours, accs)
    refresh_days(session=session, model_id=model.id, days={h - h % 24 for h in hours})
    return len(hours)


def _replace(session: Session, model_id: int, level: str, starts: Sequence[int],
             accs: dict[Key, Acc]) -> None:
    for i in range(0, len(starts), 1000):
        chunk = list(starts[i : i + 1000])
        session.execute(delete(Rollup).where(
            Rollup.model_id == model_id, Rollup.level == level, Rollup.start.in_(chunk)))
    rows = [
        {"model_id": model_id, "level": level, "start": start, "seg_key": k, "seg_value": v,
         **acc.to_row()}
        for (start, k, v), acc in accs.items()
    ]
    for i in range(0, len(rows), 2000):
        session.execute(insert(Rollup), rows[i : i + 2000])


def refresh_days(*, session: Session, model_id: int, days: set[int]) -> None:
    """Rebuild the daily rows of `days` (epoch hours at midnight) from their hourly rows."""
    if not days:
        return
    ordered = sorted(days)
    if session.get_bind().dialect.name == "postgresql":
        # a read-side refresh and the job may touch different hours of the same day: the
        # second waits here, then sums the hourly rows the first committed
        for day in ordered:
            session.execute(text("SELECT pg_advisory_xact_lock(:m, :d)"),
                            {"m": model_id, "d": day // 24})
    accs: dict[Key, Acc] = defaultdict(Acc)
    for i in range(0, len(ordered), 200):
        chunk = ordered[i : i + 200]
        rows = session.execute(select(Rollup.__table__).where(
            Rollup.model_id == model_id, Rollup.level == "h",
            and_(Rollup.start >= chunk[0], Rollup.start < chunk[-1] + 24)))
        wanted = set(chunk)
        for row in rows:
            day = row.start - row.start % 24
            if day in wanted:
                accs[(day, row.seg_key, row.seg_value)].add(Acc.from_row(row))
    _replace(session, model_id, "d", ordered, accs)
