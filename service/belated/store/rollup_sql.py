"""The GROUP BY queries that turn raw prediction rows into rollup statistics.

The queries are derived from the declared statistics (`store/statistics.py`): one "part" for
the scalars, one per histogram, one for the multiclass cells. Each runs in the database on
both stores; only aggregated rows come back, as

    (hour, segment key, segment value, *the part's group columns, *the part's values)

with ('', '') the whole model. The effective actual class of a row is its label, or the
negative class when the model has `negative_after_days` and the prediction is older than
that without a label (an implied negative, counted apart).

A scope aggregates either raw prediction rows or the logged label changes of its hours
(`Scope.changes()`): each change contributes its old state with weight -1 and its new state
with weight +1, so the result is the difference to add to the stored rollups. An erasure
(`Scope.erasing(row_ids)`) takes the same path with only the -1 side: each erased row in
the state its hour's rollups hold it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from datetime import datetime
from typing import Any

from sqlalchemy import bindparam, text
from sqlalchemy.orm import Session

from belated.store import partitions
from belated.store.dialect import Dialect
from belated.store.segments import OTHER
from belated.store.statistics import CELLS, EPS, HISTOGRAMS, SCALARS, Histogram, Kind, Terms

_NO_VALUES = ["\x01none"]  # an empty IN list is not valid SQL; no tag value looks like this


@dataclass(frozen=True)
class Scope:
    """What one refresh query covers: a model, its classes, a set of hours, the implied
    cutoff, optional tag filters, and whether it reads rows or logged label changes."""

    model_id: int
    binary: bool
    pos: str
    neg: str
    hours: Sequence[int] | range
    cutoff: datetime | None
    filters: tuple[tuple[str, str], ...] = ()
    of_changes: bool = False
    erased: tuple[int, ...] = ()

    def changes(self) -> Scope:
        """The same scope over the logged label changes of its hours."""
        return replace(self, of_changes=True)

    def erasing(self, row_ids: Sequence[int]) -> Scope:
        """The same scope over these prediction rows, each weighted -1: their contribution
        to the stored rollups, to be taken out (they must have no unfolded changes)."""
        return replace(self, of_changes=True, erased=tuple(sorted(set(row_ids))))

    def filtered(self, filters: tuple[tuple[str, str], ...]) -> Scope:
        """The same scope over the rows that carry every tag of `filters`."""
        return replace(self, filters=filters)


@dataclass(frozen=True)
class Part:
    """One GROUP BY: extra group columns, aggregated values and a row filter."""

    name: str
    group: tuple[str, ...]
    values: tuple[str, ...]
    where: str
    whole_model_only: bool = False


def _hours_sql(scope: Scope, alias: str = "") -> str:
    a = f"{alias}." if alias else ""
    if isinstance(scope.hours, range):
        lo, hi = scope.hours.start, scope.hours.stop
        return f"{a}model_id = :m AND {a}hour >= {int(lo)} AND {a}hour < {int(hi)}"
    return f"{a}model_id = :m AND {a}hour IN ({','.join(str(int(h)) for h in scope.hours)})"


def _changed_rows(scope: Scope, tables: dict[str, list[int]] | None = None) -> str:
    """Each logged change as two weighted rows (old state -1, new state +1) joined to its
    prediction, with the implied-negative cutoff its hour was aggregated with.

    `tables` (PostgreSQL) names the day partition holding each hour's predictions (or the
    parent, for a day without one): each partition is joined on its own. Joined through
    the parent, every change paid for the run-time choice of its partition (about 30 µs a
    change against 2 µs for the probe of the partition's key, at 5M predictions in
    bench/scale.py), a cost that grew with the changes a refresh folds."""
    if not tables:
        return f"({_changed_from(scope, scope.hours, 'predictions')}) AS predictions"
    joins = [_changed_from(scope, hours, table) for table, hours in sorted(tables.items())]
    return f"({' UNION ALL '.join(joins)}) AS predictions"


def _bounds(hours: Sequence[int] | range, column: str = "hour") -> str:
    """A range holding `hours`, which an index takes as its key where a list is left as a
    filter (on a table without statistics)."""
    return f"{column} BETWEEN {int(min(hours))} AND {int(max(hours))}"


def _changed_from(scope: Scope, hours: Sequence[int] | range, table: str) -> str:
    """The changes of `hours`, joined to their predictions in `table`."""
    # the bounds as well: with the log not yet analysed, PostgreSQL read every change of the
    # model for each part, keeping the hour list as a filter
    of_hours = f"{_hours_sql(replace(scope, hours=hours))} AND {_bounds(hours)}"
    old = (
        "SELECT row_id, hour, -1 AS w, old_actual AS actual, old_delay_h AS delay_h"
        f" FROM label_changes WHERE {of_hours}"
    )
    new = (
        "SELECT row_id, hour, 1 AS w, new_actual AS actual, new_delay_h AS delay_h"
        f" FROM label_changes WHERE {of_hours}"
    )
    return (
        "SELECT p.model_id, p.hour, p.ts, p.score, p.predicted, p.tags, c.actual,"
        f" c.delay_h, c.w, {_CUTOFF} AS negative_cutoff"
        f" FROM ({old} UNION ALL {new}) AS c"
        # the hour as well: it is part of the day partitions' key
        f" JOIN {table} p ON p.row_id = c.row_id AND p.hour = c.hour"
        f" WHERE {_hours_sql(replace(scope, hours=hours), 'p')}"
    )


# The cutoff an hour was aggregated with, by a lookup per row: with the change log not yet
# analysed, a join let PostgreSQL scan every hourly rollup row of the model for each change.
_CUTOFF = (
    "(SELECT r.negative_cutoff FROM rollups r WHERE r.model_id = :m AND r.level = 'h'"
    " AND r.start = p.hour AND r.seg_key = '' AND r.seg_value = '')"
)


def _erased_rows(scope: Scope, postgres: bool) -> str:
    """Each erased prediction once, weighted -1, in its stored state (with the cutoff its
    hour was aggregated with, as for a change's old state)."""
    ids = ",".join(str(int(r)) for r in scope.erased) or "NULL"
    # on PostgreSQL the hours prune the day partitions; on SQLite they let it scan every
    # row of those hours through the hour index
    hours = f" AND {_hours_sql(scope, 'p')}" if postgres and scope.hours else ""
    return (
        "(SELECT p.model_id, p.hour, p.ts, p.score, p.predicted, p.tags, p.actual,"
        f" p.delay_h, -1 AS w, {_CUTOFF} AS negative_cutoff"
        f" FROM predictions p WHERE p.model_id = :m AND p.row_id IN ({ids}){hours})"
        " AS predictions"
    )


def _terms(d: Dialect, scope: Scope) -> Terms:
    if scope.of_changes:
        # a change's old state was an implied negative if its hour was aggregated with a
        # cutoff after it, whatever the model's setting is now
        crossed: str | None = "negative_cutoff IS NOT NULL AND ts <= negative_cutoff"
    elif scope.cutoff is not None:
        crossed = "ts <= :cutoff"
    else:
        crossed = None
    if crossed is None:
        actual, implied = "actual", "0"
    else:
        actual = f"(CASE WHEN actual IS NOT NULL THEN actual WHEN {crossed} THEN :neg END)"
        implied = f"(CASE WHEN actual IS NULL AND {crossed} THEN 1 ELSE 0 END)"
    weight = "w" if scope.of_changes else "1"
    return Terms(
        actual=actual,
        implied=implied,
        weight=weight,
        rows="SUM(w)" if scope.of_changes else "COUNT(*)",
        flagged="predicted = :pos",
        clipped=d.greatest(d.least("score", repr(1 - EPS)), repr(EPS)),
        floor_int=d.floor_int,
        least=d.least,
    )


def _histogram_part(t: Terms, hist: Histogram) -> Part:
    values = [t.rows]
    if hist.score_sums:
        values.append(f"SUM({t.weighted('score')})")
    return Part(
        hist.name,
        tuple(axis.sql(t) for axis in hist.axes),
        tuple(values),
        hist.where(t),
        hist.whole_model_only,
    )


def parts(d: Dialect, scope: Scope) -> list[Part]:
    """The GROUP BYs that aggregate every declared statistic of the scope's model."""
    t = _terms(d, scope)
    scalars = tuple(
        s.sql(t) if scope.binary or not s.binary_only else ("0" if s.kind is Kind.COUNT else "0.0")
        for s in SCALARS
    )
    out = [Part("scalars", (), scalars, "")]
    out += [_histogram_part(t, h) for h in HISTOGRAMS if scope.binary or not h.binary_only]
    if not scope.binary:
        out.append(Part(CELLS, ("actual", "predicted"), (t.rows,), "actual IS NOT NULL"))
    return out


class _Query:
    """Bind parameters collected while a statement is written."""

    def __init__(self, session: Session, scope: Scope) -> None:
        self.session, self.scope = session, scope
        self.dialect = Dialect.of(session)
        self.params: dict[str, Any] = {"m": scope.model_id, "pos": scope.pos, "neg": scope.neg}
        if scope.cutoff is not None:
            self.params["cutoff"] = self.dialect.timestamp(scope.cutoff)
        self.expanding: list[str] = []

    def tag(self, key: str, param: str) -> str:
        sql, params = self.dialect.tag(key, param)
        self.params.update(params)
        return sql

    def values(self, param: str, values: Sequence[str]) -> str:
        self.params[param] = list(values) or _NO_VALUES
        self.expanding.append(param)
        return f":{param}"

    def source(self) -> str:
        if self.scope.erased:
            return _erased_rows(self.scope, self.dialect.postgres)
        if not self.scope.of_changes:
            return "predictions"
        return _changed_rows(self.scope, self._tables() if self.dialect.postgres else None)

    def _tables(self) -> dict[str, list[int]]:
        """The scope's hours by the day partition holding their predictions (PostgreSQL).

        Hours of a day without a partition of its own go through the parent: the jobs or a
        writer may give that day a partition, moving its rows out of the default one,
        between this reading of the catalogue and the statement."""
        hours = sorted(self.scope.hours)
        have = partitions.have_partitions(self.session, {h // 24 for h in hours})
        tables: dict[str, list[int]] = {}
        for h in hours:
            name = partitions.day_name(h // 24) if h // 24 in have else partitions.PARENT
            tables.setdefault(name, []).append(h)
        return tables

    def where(self, part: Part) -> str:
        # erased rows are named by row id already: a filter on their hours as well let
        # SQLite scan every row of those hours through the hour index
        conds = ["model_id = :m"] if self.scope.erased else [_hours_sql(self.scope)]
        for i, (key, value) in enumerate(self.scope.filters):  # several tags: raw rows
            self.params[f"filter_value_{i}"] = value
            conds.append(f"{self.tag(key, f'filter_key_{i}')} = :filter_value_{i}")
        if part.where:
            conds.append(part.where)
        return " AND ".join(conds)

    def run(self, sql: str) -> list[Any]:
        stmt = text(sql)
        for name in self.expanding:
            stmt = stmt.bindparams(bindparam(name, expanding=True))
        return list(self.session.execute(stmt, self.params))


def _positions(n: int) -> str:
    return ", ".join(str(i + 1) for i in range(n))


def aggregate_one_key(
    session: Session, scope: Scope, part: Part, key: str | None, values: Sequence[str]
) -> list[tuple[Any, ...]]:
    """A part for the whole model (`key` None) or for one tag key, whose admitted `values`
    are segments of their own and whose other values roll up under '(other)'."""
    q = _Query(session, scope)
    if key is None:
        segment, has_tag = "''", ""
    else:
        tag = q.tag(key, "tag_key")
        admitted = q.values("tag_values", values)
        segment = f"(CASE WHEN {tag} IN {admitted} THEN {tag} ELSE '{OTHER}' END)"
        has_tag = f" AND {tag} IS NOT NULL"
    lead = ", ".join(["hour", segment, *part.group])
    sql = (
        f"SELECT {lead}, {', '.join(part.values)} FROM {q.source()}"
        f" WHERE {q.where(part)}{has_tag} GROUP BY {_positions(2 + len(part.group))}"
    )
    skey = key or ""
    return [(row[0], skey, *row[1:]) for row in q.run(sql)]


def aggregate_all_keys(
    session: Session, scope: Scope, part: Part, keys: dict[str, list[str]]
) -> list[tuple[Any, ...]]:
    """A part for the whole model and every tag key in one scan (PostgreSQL GROUPING SETS)."""
    q = _Query(session, scope)
    assert q.dialect.postgres
    names = list(keys)
    segments = []
    for i, key in enumerate(names):
        tag = q.tag(key, f"key_{i}")
        admitted = q.values(f"values_{i}", keys[key])
        segments.append(
            f"(CASE WHEN {tag} IN {admitted} THEN {tag}"
            f" WHEN {tag} IS NOT NULL THEN '{OTHER}' END) AS s{i}"
        )
    seg_cols = [f"s{i}" for i in range(len(names))]
    group_cols = [f"g{i}" for i in range(len(part.group))]
    inner = ", ".join([*segments, *(f"{g} AS g{i}" for i, g in enumerate(part.group))])
    # one grouping set for the whole model, then one per tag key
    sets = [["hour", *group_cols]] + [["hour", s, *group_cols] for s in seg_cols]
    sql = (
        f"SELECT hour, GROUPING({', '.join(seg_cols)}), {', '.join([*seg_cols, *group_cols])},"
        f" {', '.join(part.values)}"
        f" FROM (SELECT *, {inner} FROM {q.source()} WHERE {q.where(part)}) AS predictions"
        f" GROUP BY GROUPING SETS ({', '.join('(' + ', '.join(s) + ')' for s in sets)})"
    )
    n = len(names)
    whole_model = (1 << n) - 1
    out: list[tuple[Any, ...]] = []
    for row in q.run(sql):
        # GROUPING(s0, ..., s{n-1}) has bit n-1-i set when s{i} is not in the row's grouping
        # set: all bits for the whole model, all but one for the set of key i
        mask, rest = row[1], tuple(row[2 + n :])
        if mask == whole_model:
            out.append((row[0], "", "", *rest))
            continue
        i = next(i for i in range(n) if not mask & (1 << (n - 1 - i)))
        if row[2 + i] is not None:  # predictions without the tag are in no segment of it
            out.append((row[0], names[i], row[2 + i], *rest))
    return out
