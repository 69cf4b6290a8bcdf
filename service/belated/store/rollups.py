"""Recompute rollups of chosen hours from raw rows, and the daily rows above them."""

from __future__ import annotations

import logging
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import replace
from datetime import datetime, timedelta
from typing import Any

import numpy as np
from psycopg.types.json import Jsonb
from sqlalchemy import delete, insert, select, text, tuple_
from sqlalchemy.orm import Session

from belated.store import bulk, segments
from belated.store import rollup_sql as q
from belated.store.accumulate import Acc, cell_key
from belated.store.packing import N_BINS, unpack_delays
from belated.store.rollup_tables import Rollup
from belated.store.tables import LabelChange, ModelRow

log = logging.getLogger(__name__)
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


def compute(session: Session, scope: q.Scope, keys: dict[str, list[str]]) -> dict[Key, Acc]:
    """Aggregate the scope's raw rows into accumulators per (hour, segment)."""
    accs: dict[Key, Acc] = defaultdict(Acc)
    if keys and session.get_bind().dialect.name == "postgresql":
        # one scan for the whole model and every tag key
        sets = {
            what: q.grouped(session, scope, keys, what)
            for what in ("scalars", "histograms" if scope.binary else "cells")
        }
    else:
        sets = defaultdict(list)
        kinds = [
            ("scalars", q.scalars),
            ("histograms", q.histograms) if scope.binary else ("cells", q.cells),
        ]
        for key in [None, *keys]:
            values, skey = (keys.get(key, []) if key else []), key or ""
            for what, query in kinds:
                sets[what] += [(r[0], skey, *r[1:]) for r in query(session, scope, key, values)]
    for hour, skey, seg, *values in sets["scalars"]:
        accs[(hour, skey, seg)].set_scalars(values)
    if scope.binary:
        _add_histograms(accs, sets["histograms"])
    for hour, skey, seg, actual, predicted, n in sets.get("cells", ()):
        acc = accs[(hour, skey, seg)]
        acc.cells = acc.cells or {}
        acc.cells[cell_key(actual, predicted)] = int(n)
    for hour, bin_, n in q.delays(session, scope):
        acc = accs[(hour, "", "")]
        if acc.delays is None:
            acc.delays = unpack_delays(None)
        acc.delays[bin_] += n
    return accs


def _add_histograms(accs: dict[Key, Acc], rows: list[Any]) -> None:
    """Histogram rows (hour, segment key, segment value, class, bin, count, score sum) into
    the accumulators, one numpy scatter per segment rather than one assignment per row."""
    grouped: dict[Key, list[Any]] = defaultdict(list)
    for row in rows:
        grouped[(row[0], row[1], row[2])].append(row)
    for key, group in grouped.items():
        acc = accs[key]
        _, _, _, cls, bins, n, ssum = zip(*group, strict=True)
        flat = np.asarray(cls, np.int64) * N_BINS + np.asarray(bins, np.int64)
        np.add.at(acc.hist.reshape(-1), flat, np.asarray(n, np.int64))
        np.add.at(acc.hsum.reshape(-1), flat, np.asarray([v or 0.0 for v in ssum], np.float64))


def refresh_hours(
    *,
    session: Session,
    model: ModelRow,
    hours: Sequence[int],
    now: datetime,
    max_values: int,
    changed: Sequence[int] = (),
) -> int:
    """Bring the hourly rollups of `hours` and `changed`, and the daily rows above, up to date.

    `hours` are aggregated again from raw rows. `changed` are hours where only labels
    changed since their rollups were written: the logged changes are folded in by
    difference (old state out, new state in), a cost that follows the number of changes.
    An hour whose rollups cannot take the difference (never aggregated, a segment admitted
    since) is aggregated from raw rows instead.
    """
    whole = sorted(set(hours))
    changed = sorted(set(changed) - set(whole))
    if not whole and not changed:
        return 0
    _lock_days(session, model.id, {h - h % 24 for h in (*whole, *changed)})
    day_deltas: dict[Key, Acc] = {}
    if changed:
        stuck, day_deltas = _fold_changes(session, model, changed, now)
        whole = sorted(set(whole) | stuck)
    accs: dict[Key, Acc] = {}
    if whole:
        keys = segments.admit(session=session, model=model, hours=whole, max_values=max_values)
        scope = scope_of(model, whole, now)
        accs = compute(session, scope, keys)
        _replace(session, model.id, "h", whole, accs, cuts=dict.fromkeys(whole, scope.cutoff))
    _forget_changes(session, model.id, [*whole, *changed])
    recount = {h - h % 24 for h in whole}
    recount |= _add_days(
        session, model.id, {k: v for k, v in day_deltas.items() if k[0] not in recount}
    )
    refresh_days(session=session, model_id=model.id, days=recount, known=accs, known_hours=whole)
    return len(set(whole) | set(changed))


def _fold_changes(
    session: Session, model: ModelRow, hours: list[int], now: datetime
) -> tuple[set[int], dict[Key, Acc]]:
    """Add the logged label changes of `hours` to their hourly rows.

    Returns the hours that need a recompute instead, and the per-day sums of the
    differences applied (for the daily rows).
    """
    keys = segments.current(session=session, model=model)
    delta = compute(session, replace(scope_of(model, hours, now), changes=True), keys)
    if not delta:
        return set(), {}
    stored: dict[Key, Acc] = {}
    cuts: dict[int, datetime | None] = {}
    for row in _rows(session, model.id, "h", sorted({k[0] for k in delta})):
        stored[(row.start, row.seg_key, row.seg_value)] = Acc.from_row(row)
        if row.seg_key == "" and row.seg_value == "":
            cuts[row.start] = row.cut
    stuck = {h for (h, k, v) in delta if (h, "", "") not in stored or (h, k, v) not in stored}
    if model.negative_after_days is not None:
        # aggregated before cutoffs were stored with rows: how its unlabelled rows were
        # counted is unknown, so a difference cannot be taken
        stuck |= {h for h in cuts if cuts[h] is None}
    for key, acc in delta.items():
        if key[0] not in stuck:
            stored[key].add(acc)
            stored[key].tidy()
            if not stored[key].valid():
                stuck.add(key[0])  # cannot happen if the log is whole; recompute to be sure
    if stuck:
        log.warning(
            "model %s: %d hours aggregated again instead of folding label changes",
            model.id,
            len(stuck),
        )
    _rewrite(session, model.id, "h", {k: stored[k] for k in delta if k[0] not in stuck}, cuts)
    per_day: dict[Key, Acc] = defaultdict(Acc)
    for (hour, k, v), acc in delta.items():
        if hour not in stuck:
            per_day[(hour - hour % 24, k, v)].add(acc)
    return stuck, per_day


def _add_days(session: Session, model_id: int, deltas: dict[Key, Acc]) -> set[int]:
    """Add differences to daily rows; return the days that must be summed again instead."""
    if not deltas:
        return set()
    stored = {
        (r.start, r.seg_key, r.seg_value): Acc.from_row(r)
        for r in _rows(session, model_id, "d", sorted({k[0] for k in deltas}))
    }
    missing = {k[0] for k in deltas if k not in stored}
    for key, acc in deltas.items():
        if key[0] not in missing:
            stored[key].add(acc)
            stored[key].tidy()
    _rewrite(session, model_id, "d", {k: stored[k] for k in deltas if k[0] not in missing}, {})
    return missing


def _rewrite(
    session: Session,
    model_id: int,
    level: str,
    accs: dict[Key, Acc],
    cuts: dict[int, datetime | None],
) -> None:
    """Replace exactly these rows (the other rows of their hours or days did not change)."""
    keys = list(accs)
    if keys and bulk.is_pg(session):  # a join on the key: IN over row values scans instead
        starts, skeys, values = (list(x) for x in zip(*keys, strict=True))
        session.execute(
            text(
                "DELETE FROM rollups r USING unnest(CAST(:s AS int4[]), CAST(:k AS text[]),"
                " CAST(:v AS text[])) AS d(start, seg_key, seg_value) WHERE r.model_id = :m"
                " AND r.level = :l AND r.start = d.start AND r.seg_key = d.seg_key"
                " AND r.seg_value = d.seg_value"
            ),
            {"s": starts, "k": skeys, "v": values, "m": model_id, "l": level},
        )
        keys = []
    for i in range(0, len(keys), 1000):
        session.execute(
            delete(Rollup).where(
                Rollup.model_id == model_id,
                Rollup.level == level,
                tuple_(Rollup.start, Rollup.seg_key, Rollup.seg_value).in_(keys[i : i + 1000]),
            )
        )
    _insert(session, model_id, level, accs, cuts)


_PG_TYPES = {
    "model_id": "int4",
    "level": "varchar",
    "start": "int4",
    "seg_key": "varchar",
    "seg_value": "varchar",
    **dict.fromkeys(q.SCALARS[:8], "int8"),
    **dict.fromkeys(q.SCALARS[8:], "float8"),
    "hist": "bytea",
    "delays": "bytea",
    "cells": "jsonb",
    "cut": "timestamptz",
}


def _rows(session: Session, model_id: int, level: str, starts: list[int]) -> list[Any]:
    if bulk.is_pg(session):  # bytea in binary: no hex to decode
        return bulk.fetch_binary(
            session,
            "SELECT * FROM rollups WHERE model_id = %s AND level = %s AND start = ANY(%s)",
            (model_id, level, starts),
        )
    out: list[Any] = []
    for i in range(0, len(starts), 500):
        out.extend(
            session.execute(
                select(Rollup.__table__).where(
                    Rollup.model_id == model_id,
                    Rollup.level == level,
                    Rollup.start.in_(starts[i : i + 500]),
                )
            )
        )
    return out


def _forget_changes(session: Session, model_id: int, hours: list[int]) -> None:
    # Writers of these hours wait on the claimed marks, so no change of theirs can commit
    # between the aggregation above and this delete.
    for i in range(0, len(hours), 1000):
        session.execute(
            delete(LabelChange).where(
                LabelChange.model_id == model_id, LabelChange.hour.in_(hours[i : i + 1000])
            )
        )


def _lock_days(session: Session, model_id: int, days: set[int]) -> None:
    if session.get_bind().dialect.name != "postgresql":
        return
    # a read-side refresh and the job may touch different hours of the same day: the
    # second waits here, then reads the daily rows the first committed (in day order, so
    # that two refreshes cannot wait on each other)
    for day in sorted(days):
        session.execute(
            text("SELECT pg_advisory_xact_lock(:m, :d)"), {"m": model_id, "d": day // 24}
        )


def _replace(
    session: Session,
    model_id: int,
    level: str,
    starts: Sequence[int],
    accs: dict[Key, Acc],
    cuts: dict[int, datetime | None] | None = None,
) -> None:
    for i in range(0, len(starts), 1000):
        chunk = list(starts[i : i + 1000])
        session.execute(
            delete(Rollup).where(
                Rollup.model_id == model_id, Rollup.level == level, Rollup.start.in_(chunk)
            )
        )
    _insert(session, model_id, level, accs, cuts or {})


def _insert(
    session: Session,
    model_id: int,
    level: str,
    accs: dict[Key, Acc],
    cuts: dict[int, datetime | None],
) -> None:
    rows = [
        {
            "model_id": model_id,
            "level": level,
            "start": start,
            "seg_key": k,
            "seg_value": v,
            "cut": cuts.get(start),
            **acc.to_row(),
        }
        for (start, k, v), acc in accs.items()
    ]
    if not rows:
        return
    if bulk.is_pg(session):  # the ORM sent these one statement per row
        cols = list(rows[0])
        bulk.copy_rows(
            session,
            "rollups",
            cols,
            (
                [Jsonb(r[c]) if c == "cells" and r[c] is not None else r[c] for c in cols]
                for r in rows
            ),
            types=[_PG_TYPES[c] for c in cols],
        )
        return
    for i in range(0, len(rows), 2000):
        session.execute(insert(Rollup), rows[i : i + 2000])


def refresh_days(
    *,
    session: Session,
    model_id: int,
    days: set[int],
    known: dict[Key, Acc] | None = None,
    known_hours: Sequence[int] = (),
) -> None:
    """Rebuild the daily rows of `days` (epoch hours at midnight) from their hourly rows.

    `known` holds the complete hourly rows of `known_hours` just written by the caller;
    only the other hours of those days are read back from the store.
    """
    if not days:
        return
    ordered = sorted(days)
    _lock_days(session, model_id, days)
    accs: dict[Key, Acc] = defaultdict(Acc)
    wanted = set(ordered)
    for (hour, k, v), acc in (known or {}).items():
        if hour - hour % 24 in wanted:
            accs[(hour - hour % 24, k, v)].add(acc)
    skip = set(known_hours)
    needed = sorted({d + h for d in ordered for h in range(24)} - skip)
    for row in _rows(session, model_id, "h", needed):
        accs[(row.start - row.start % 24, row.seg_key, row.seg_value)].add(Acc.from_row(row))
    _replace(session, model_id, "d", ordered, accs)
