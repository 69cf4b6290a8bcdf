"""Bring the rollups of chosen hours, and the daily rows above them, up to date.

dirty mark (model, hour, recompute?)          claimed by store/refresh.py
    │
    ├─ recompute: new predictions, an implied-negative cutoff crossed, a rebuild,
    │  a changed rollup setting ──▶ aggregate the hour from raw rows (compute)
    │                                 └─▶ replace its hourly rows (with the cutoff used)
    │
    └─ fold: only labels changed (label_changes logs old and new state)
           ──▶ aggregate the changes, old state -1 and new +1 (compute on Scope.changes())
           ──▶ add the difference to the stored hourly rows
           └─ an hour that cannot take a difference (never aggregated, a segment
              admitted since, no stored cutoff, a count that would go negative)
              ──▶ recompute from raw rows instead, with a warning
    │
    ▼
daily rows: the folded differences are added to them; days with a recomputed hour
are summed again from their hourly rows
    │
    ▼
the folded changes are deleted (writers of these hours wait on the hours' locks)
"""

from __future__ import annotations

import logging
from collections import defaultdict
from collections.abc import Sequence
from datetime import datetime, timedelta
from typing import Any

import numpy as np
from psycopg.types.json import Jsonb
from sqlalchemy import delete, insert, select, text, tuple_
from sqlalchemy.orm import Session

from belated.classes import negative_class, positive_class
from belated.store import bulk, segments
from belated.store.dialect import Dialect, is_postgres
from belated.store.rollup_sql import Part, Scope, aggregate_all_keys, aggregate_one_key, parts
from belated.store.rollup_tables import Rollup
from belated.store.statistics import CELLS, HISTOGRAM_BY_NAME, pg_types
from belated.store.tables import LabelChange, ModelRow
from belated.store.totals import Totals, cell_key

log = logging.getLogger(__name__)
Key = tuple[int, str, str]  # (start hour, segment key, segment value)

DELETE_CHUNK = 1000  # starts or keys per DELETE on SQLite
INSERT_CHUNK = 2000  # rows per executemany INSERT on SQLite
READ_CHUNK = 500  # starts per SELECT on SQLite
_PG_TYPES = pg_types()


def scope_of(model: ModelRow, hours: Sequence[int] | range, now: datetime) -> Scope:
    """The query scope of a model's hours at time `now` (over raw rows)."""
    pos = positive_class(model.positive, model.classes)
    neg = negative_class(model.positive, model.classes)
    cutoff = None
    if model.negative_after_days is not None:
        cutoff = now - timedelta(days=model.negative_after_days)
    binary = model.kind == "binary"
    return Scope(
        model.id, binary, pos, neg, hours if isinstance(hours, range) else list(hours), cutoff
    )


def compute(session: Session, scope: Scope, keys: dict[str, list[str]]) -> dict[Key, Totals]:
    """Aggregate the scope's raw rows (or logged changes) into totals per (hour, segment)."""
    totals: dict[Key, Totals] = defaultdict(Totals)
    one_scan = bool(keys) and is_postgres(session)
    for part in parts(Dialect.of(session), scope):
        if one_scan and not part.whole_model_only:
            rows = aggregate_all_keys(session, scope, part, keys)
        else:
            rows = []
            for key in [None] if part.whole_model_only else [None, *keys]:
                values = keys.get(key, []) if key else []
                rows += aggregate_one_key(session, scope, part, key, values)
        gather(totals, part, rows)
    return totals


def gather(totals: dict[Key, Totals], part: Part, rows: Sequence[Sequence[Any]]) -> None:
    """Rows of one part, (hour, segment key, value, *group columns, *values), into the
    totals (also used by belated.lake, whose engines return rows of the same parts)."""
    if part.name == "scalars":
        for hour, skey, seg, *values in rows:
            totals[(int(hour), skey, seg)].set_scalars(values)
    elif part.name == CELLS:
        for hour, skey, seg, actual, predicted, n in rows:
            t = totals[(int(hour), skey, seg)]
            t.cells = t.cells or {}
            t.cells[cell_key(actual, predicted)] = int(n)
    else:
        _scatter(totals, part.name, len(part.group), rows)


def _scatter(
    totals: dict[Key, Totals], name: str, n_axes: int, rows: Sequence[Sequence[Any]]
) -> None:
    """Histogram rows (hour, segment key, value, *cell index, count[, score sum]) into the
    totals, one numpy scatter per segment rather than one assignment per row."""
    hist = HISTOGRAM_BY_NAME[name]
    by_key: dict[Key, list[Any]] = defaultdict(list)
    for row in rows:
        by_key[(int(row[0]), row[1], row[2])].append(row[3:])
    for key, group in by_key.items():
        cols = list(zip(*group, strict=True))
        flat = np.ravel_multi_index(
            tuple(np.asarray(c, np.int64) for c in cols[:n_axes]), hist.shape
        )
        t = totals[key]
        np.add.at(t.counts(name).reshape(-1), flat, np.asarray(cols[n_axes], np.int64))
        if hist.score_sums:
            sums = np.asarray([v or 0.0 for v in cols[n_axes + 1]], np.float64)
            np.add.at(t.sums(name).reshape(-1), flat, sums)


def refresh_hours(
    *,
    session: Session,
    model: ModelRow,
    recompute: Sequence[int],
    now: datetime,
    max_values: int,
    fold: Sequence[int] = (),
) -> int:
    """Bring the hourly rollups of `recompute` and `fold`, and the daily rows above, up to
    date; return the number of hours done.

    `recompute` hours are aggregated again from raw rows. `fold` hours are where only labels
    changed since their rollups were written: the logged changes are added by difference
    (old state out, new state in), a cost that follows the number of changes.
    """
    raw_hours = sorted(set(recompute))
    fold_hours = sorted(set(fold) - set(raw_hours))
    if not raw_hours and not fold_hours:
        return 0
    _lock_days(session, model.id, {h - h % 24 for h in (*raw_hours, *fold_hours)})
    day_differences: dict[Key, Totals] = {}
    if fold_hours:
        unfoldable, day_differences = _fold_changes(session, model, fold_hours, now)
        raw_hours = sorted(set(raw_hours) | unfoldable)
    fresh: dict[Key, Totals] = {}
    if raw_hours:
        keys = segments.admit(session=session, model=model, hours=raw_hours, max_values=max_values)
        scope = scope_of(model, raw_hours, now)
        fresh = compute(session, scope, keys)
        cutoffs: dict[int, datetime | None] = dict.fromkeys(raw_hours, scope.cutoff)
        _replace(session, model.id, "h", raw_hours, fresh, cutoffs)
    _forget_changes(session, model.id, [*raw_hours, *fold_hours])
    days_to_sum = {h - h % 24 for h in raw_hours}
    days_to_sum |= _add_to_days(
        session, model.id, {k: v for k, v in day_differences.items() if k[0] not in days_to_sum}
    )
    refresh_days(
        session=session, model_id=model.id, days=days_to_sum, known=fresh, known_hours=raw_hours
    )
    return len(set(raw_hours) | set(fold_hours))


def take_out(
    *,
    session: Session,
    model: ModelRow,
    difference: dict[Key, Totals],
    now: datetime,
    max_values: int,
) -> int:
    """Add `difference` (erased rows weighted -1, computed before they were deleted) to the
    hourly and daily rows; an hour that cannot take it is aggregated again from the raw
    rows that remain. Returns the number of hours changed.

    The caller holds the hours (store/dirty.py) and has refreshed them first, so that the
    stored rows hold exactly the state the difference was computed from.
    """
    unfoldable, day_differences = _apply(session, model, difference)
    fresh: dict[Key, Totals] = {}
    raw_hours = sorted(unfoldable)
    if raw_hours:
        keys = segments.admit(session=session, model=model, hours=raw_hours, max_values=max_values)
        scope = scope_of(model, raw_hours, now)
        fresh = compute(session, scope, keys)
        _replace(session, model.id, "h", raw_hours, fresh, dict.fromkeys(raw_hours, scope.cutoff))
    days_to_sum = {h - h % 24 for h in raw_hours}
    days_to_sum |= _add_to_days(
        session, model.id, {k: v for k, v in day_differences.items() if k[0] not in days_to_sum}
    )
    refresh_days(
        session=session, model_id=model.id, days=days_to_sum, known=fresh, known_hours=raw_hours
    )
    return len({k[0] for k in difference})


def _fold_changes(
    session: Session, model: ModelRow, hours: list[int], now: datetime
) -> tuple[set[int], dict[Key, Totals]]:
    """Add the logged label changes of `hours` to their hourly rows.

    Returns the hours that need a recompute instead, and the per-day sums of the
    differences applied (for the daily rows).
    """
    keys = segments.current(session=session, model=model)
    difference = compute(session, scope_of(model, hours, now).changes(), keys)
    return _apply(session, model, difference)


def _apply(
    session: Session, model: ModelRow, difference: dict[Key, Totals]
) -> tuple[set[int], dict[Key, Totals]]:
    """Add a difference to the stored hourly rows; the hours that need a recompute
    instead, and the per-day sums of the differences applied."""
    if not difference:
        return set(), {}
    stored: dict[Key, Totals] = {}
    cutoffs: dict[int, datetime | None] = {}
    for row in _rows(session, model.id, "h", sorted({k[0] for k in difference})):
        stored[(row.start, row.seg_key, row.seg_value)] = Totals.from_row(row)
        if row.seg_key == "" and row.seg_value == "":
            cutoffs[row.start] = row.negative_cutoff
    unfoldable = {
        h for (h, k, v) in difference if (h, "", "") not in stored or (h, k, v) not in stored
    }
    if model.negative_after_days is not None:
        # aggregated before cutoffs were stored with rows: how its unlabelled rows were
        # counted is unknown, so a difference cannot be taken
        unfoldable |= {h for h in cutoffs if cutoffs[h] is None}
    for key, change in difference.items():
        if key[0] not in unfoldable:
            stored[key].add(change)
            stored[key].drop_remainders()
            if not stored[key].nonnegative():
                unfoldable.add(key[0])  # cannot happen if the log is whole; recompute to be sure
    if unfoldable:
        log.warning(
            "model %s: %d hours aggregated again instead of taking a difference",
            model.id,
            len(unfoldable),
        )
    folded = {k: stored[k] for k in difference if k[0] not in unfoldable}
    _rewrite(session, model.id, "h", folded, cutoffs)
    per_day: dict[Key, Totals] = defaultdict(Totals)
    for (hour, k, v), change in difference.items():
        if hour not in unfoldable:
            per_day[(hour - hour % 24, k, v)].add(change)
    return unfoldable, per_day


def _add_to_days(session: Session, model_id: int, differences: dict[Key, Totals]) -> set[int]:
    """Add differences to daily rows; return the days that must be summed again instead."""
    if not differences:
        return set()
    stored = {
        (r.start, r.seg_key, r.seg_value): Totals.from_row(r)
        for r in _rows(session, model_id, "d", sorted({k[0] for k in differences}))
    }
    missing = {k[0] for k in differences if k not in stored}
    for key, change in differences.items():
        if key[0] not in missing:
            stored[key].add(change)
            stored[key].drop_remainders()
    rewritten = {k: stored[k] for k in differences if k[0] not in missing}
    _rewrite(session, model_id, "d", rewritten, {})
    return missing


def _rewrite(
    session: Session,
    model_id: int,
    level: str,
    totals: dict[Key, Totals],
    cutoffs: dict[int, datetime | None],
) -> None:
    """Replace exactly these rows (the other rows of their hours or days did not change)."""
    keys = list(totals)
    if keys and is_postgres(session):  # a join on the key: IN over row values scans instead
        starts, skeys, values = (list(x) for x in zip(*keys, strict=True))
        session.execute(
            text(
                "DELETE FROM rollups r USING unnest(CAST(:s AS int4[]), CAST(:k AS text[]),"
                " CAST(:v AS text[])) AS d(start, seg_key, seg_value) WHERE r.model_id = :m"
                " AND r.level = :l AND r.start BETWEEN :lo AND :hi AND r.start = d.start"
                " AND r.seg_key = d.seg_key AND r.seg_value = d.seg_value"
            ),
            {
                "s": starts,
                "k": skeys,
                "v": values,
                "m": model_id,
                "l": level,
                "lo": min(starts),
                "hi": max(starts),
            },
        )
        keys = []
    for i in range(0, len(keys), DELETE_CHUNK):
        session.execute(
            delete(Rollup).where(
                Rollup.model_id == model_id,
                Rollup.level == level,
                tuple_(Rollup.start, Rollup.seg_key, Rollup.seg_value).in_(
                    keys[i : i + DELETE_CHUNK]
                ),
            )
        )
    _insert(session, model_id, level, totals, cutoffs)


# The bounds as well as the list: on rollups not yet analysed (after a rebuild, or a new
# store) PostgreSQL kept the list as a filter and read every row of the model's level (70 ms
# a read at a year of hours, bench/scale.py at 5M predictions), a cost growing with the store.
ROWS_SQL = (
    "SELECT * FROM rollups WHERE model_id = %s AND level = %s"
    " AND start BETWEEN %s AND %s AND start = ANY(%s)"
)


def _rows(session: Session, model_id: int, level: str, starts: list[int]) -> list[Any]:
    if is_postgres(session):  # bytea in binary: no hex to decode
        if not starts:
            return []
        return bulk.fetch_binary(
            session, ROWS_SQL, (model_id, level, min(starts), max(starts), starts)
        )
    out: list[Any] = []
    for i in range(0, len(starts), READ_CHUNK):
        out.extend(
            session.execute(
                select(Rollup.__table__).where(
                    Rollup.model_id == model_id,
                    Rollup.level == level,
                    Rollup.start.in_(starts[i : i + READ_CHUNK]),
                )
            )
        )
    return out


def _forget_changes(session: Session, model_id: int, hours: list[int]) -> None:
    # Writers of these hours wait on the hours' locks (store/dirty.py), so no change of
    # theirs can commit between the aggregation above and this delete.
    for i in range(0, len(hours), DELETE_CHUNK):
        session.execute(
            delete(LabelChange).where(
                LabelChange.model_id == model_id,
                LabelChange.hour.in_(hours[i : i + DELETE_CHUNK]),
            )
        )


def _lock_days(session: Session, model_id: int, days: set[int]) -> None:
    if not is_postgres(session):
        return
    # a read-side refresh and the job may touch different hours of the same day: the
    # second waits here, then reads the daily rows the first committed (in day order, so
    # that two refreshes cannot wait on each other)
    for day in sorted(days):
        session.execute(
            # days as negative keys: the non-negative ones are the hours (store/dirty.py)
            text("SELECT pg_advisory_xact_lock(:m, :d)"),
            {"m": model_id, "d": -1 - day // 24},
        )


def _replace(
    session: Session,
    model_id: int,
    level: str,
    starts: Sequence[int],
    totals: dict[Key, Totals],
    cutoffs: dict[int, datetime | None] | None = None,
) -> None:
    for i in range(0, len(starts), DELETE_CHUNK):
        chunk = list(starts[i : i + DELETE_CHUNK])
        session.execute(
            delete(Rollup).where(
                Rollup.model_id == model_id,
                Rollup.level == level,
                # the bounds: an index key where the list alone was a filter over every
                # row of the model's level (PostgreSQL, rollups not yet analysed)
                Rollup.start.between(min(chunk), max(chunk)),
                Rollup.start.in_(chunk),
            )
        )
    _insert(session, model_id, level, totals, cutoffs or {})


def _insert(
    session: Session,
    model_id: int,
    level: str,
    totals: dict[Key, Totals],
    cutoffs: dict[int, datetime | None],
) -> None:
    rows = [
        {
            "model_id": model_id,
            "level": level,
            "start": start,
            "seg_key": k,
            "seg_value": v,
            "negative_cutoff": cutoffs.get(start),
            **t.to_row(),
        }
        for (start, k, v), t in totals.items()
        if not t.empty()  # every row of it taken out (an erasure): a recount has no row
    ]
    if not rows:
        return
    if is_postgres(session):  # the ORM sent these one statement per row
        cols = list(rows[0])
        bulk.copy_rows(
            session,
            "rollups",
            cols,
            (
                [Jsonb(r[c]) if c == CELLS and r[c] is not None else r[c] for c in cols]
                for r in rows
            ),
            types=[_PG_TYPES[c] for c in cols],
        )
        return
    for i in range(0, len(rows), INSERT_CHUNK):
        session.execute(insert(Rollup), rows[i : i + INSERT_CHUNK])


def replace_hours(
    *, session: Session, model_id: int, hours: Sequence[int], totals: dict[Key, Totals]
) -> None:
    """Replace every row of `hours` with `totals` (rows uploaded for a lake-fed model), and
    sum the daily rows above them again."""
    days = {h - h % 24 for h in hours}
    _lock_days(session, model_id, days)
    _replace(session, model_id, "h", sorted(hours), totals)
    refresh_days(session=session, model_id=model_id, days=days, known=totals, known_hours=hours)


def refresh_days(
    *,
    session: Session,
    model_id: int,
    days: set[int],
    known: dict[Key, Totals] | None = None,
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
    totals: dict[Key, Totals] = defaultdict(Totals)
    wanted = set(ordered)
    for (hour, k, v), t in (known or {}).items():
        if hour - hour % 24 in wanted:
            totals[(hour - hour % 24, k, v)].add(t)
    skip = set(known_hours)
    needed = sorted({d + h for d in ordered for h in range(24)} - skip)
    for row in _rows(session, model_id, "h", needed):
        totals[(row.start - row.start % 24, row.seg_key, row.seg_value)].add(Totals.from_row(row))
    _replace(session, model_id, "d", ordered, totals)
