"""Rollup rows from a predictions table and a labels table, on DuckDB or Spark.

The SQL is not written here: every statistic comes from the declaration the store uses
(`store/statistics.py`, through `store/rollup_sql.parts`), evaluated over one joined
relation with the columns the store's refresh reads (`hour`, `ts`, `score`, `predicted`,
`actual`, `delay_h` and one column per tag key). What differs from the store is only how
that relation is made from the team's logs:

- predictions: `id`, `ts` (timestamp), `score` (the positive-class probability of a binary
  model), optionally `predicted` (else `score >= threshold` decides), and one string column
  per tag (NULL: the prediction lacks the tag).
- labels: `id`, `actual`, `ts` (the outcome time) and optionally `received_at` (the arrival
  order; `ts` when absent). As over HTTP, the last label to arrive is the prediction's
  label, and its delay is measured to the first label of the run of equal values that
  ends the prediction's history (a repeat of the same label changes nothing). Labels of
  ids without a prediction (orphans) count nowhere.

Admitted segment values: each tag key keeps its `max_values` smallest values (sorted) over
all the predictions given; the others roll up under '(other)'. Over HTTP the store admits
values as its refreshes first see them (each batch of up to 168 dirty hours, in hour order,
admits its new values sorted until the key is full) and keeps that choice, so its set
depends on when refreshes ran against when rows arrived, which no log records: the lake
job cannot reproduce it. The two agree while a key has at most `max_values` values (all
admitted, the usual case at 100), and they may differ past that. A lake run recomputes the
set from the predictions it reads, so past the limit a new value that sorts first changes
it: hours uploaded before keep the old set until they are run again.
"""

from __future__ import annotations

import re
from collections import defaultdict
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Protocol

from belated.lake.settings import LakeModel
from belated.store.dialect import Dialect
from belated.store.rollup_sql import Part, Scope, parts
from belated.store.rollups import Key, gather
from belated.store.segments import OTHER
from belated.store.totals import Totals

PREDICTION_COLUMNS = ("id", "ts", "score", "predicted")
HOUR_US = 3_600_000_000


class Engine(Protocol):
    """What the job asks of an engine: SQL over registered relations."""

    def register(self, name: str, source: Any) -> None:
        """Make a table (paths, or an engine's own frame) queryable as `name`."""

    def columns(self, name: str) -> list[str]:
        """The column names of a registered relation."""

    def materialize(self, name: str, sql: str) -> None:
        """Keep the result of `sql` as `name` for the queries that follow."""

    def rows(self, sql: str) -> list[tuple[Any, ...]]:
        """Run a query and return its rows."""

    def epoch_us(self, expr: str) -> str:
        """A timestamp expression as integer microseconds since the epoch."""

    def ident(self, name: str) -> str:
        """A quoted identifier."""

    def literal(self, value: str) -> str:
        """A string literal."""

    def portable(self, sql: str) -> str:
        """The declared SQL in this engine's spelling."""

    def close(self) -> None:
        """Release what the engine holds."""


def literal(value: str) -> str:
    """A standard SQL string literal (a quote doubled inside)."""
    return "'" + value.replace("'", "''") + "'"


@dataclass(frozen=True)
class Hours:
    """Which hours to compute: all, from an hour on, and/or a set."""

    since: int | None = None
    only: frozenset[int] | None = None

    def sql(self) -> str:
        conds = []
        if self.since is not None:
            conds.append(f"hour >= {int(self.since)}")
        if self.only is not None:
            listed = ",".join(str(int(h)) for h in sorted(self.only)) or "NULL"
            conds.append(f"hour IN ({listed})")
        return " AND ".join(conds) or "TRUE"


def _effective_labels(engine: Engine, label_cols: list[str]) -> str:
    """Per prediction id, its label and the time its delay is measured to."""
    ts = engine.epoch_us("ts")
    arrival = engine.epoch_us("received_at") if "received_at" in label_cols else ts
    return f"""
    WITH l AS (
      SELECT CAST(id AS VARCHAR(256)) AS id, CAST(actual AS VARCHAR(256)) AS actual,
             {ts} AS label_us,
             ROW_NUMBER() OVER (PARTITION BY id ORDER BY {arrival}, {ts}) AS k
      FROM labels WHERE id IS NOT NULL AND actual IS NOT NULL
    ), last_k AS (SELECT id, MAX(k) AS n FROM l GROUP BY id),
    final AS (SELECT l.id, l.actual FROM l JOIN last_k ON l.id = last_k.id AND l.k = last_k.n),
    run_start AS (
      SELECT l.id, MAX(CASE WHEN l.actual <> final.actual THEN l.k ELSE 0 END) AS b
      FROM l JOIN final ON l.id = final.id GROUP BY l.id
    )
    SELECT l.id, l.actual, l.label_us FROM l JOIN run_start r ON l.id = r.id AND l.k = r.b + 1
    """


def _joined(engine: Engine, model: LakeModel, tags: list[str], hours: Hours) -> str:
    pred_cols = engine.columns("predictions")
    ts = engine.epoch_us("p.ts")
    if "predicted" in pred_cols:
        predicted = "CAST(p.predicted AS VARCHAR(256))"
    else:
        predicted = (
            f"(CASE WHEN p.score >= CAST({model.threshold!r} AS DOUBLE)"
            f" THEN {engine.literal(model.pos)} ELSE {engine.literal(model.neg)} END)"
        )
    score = "CAST(p.score AS DOUBLE)" if "score" in pred_cols else "CAST(NULL AS DOUBLE)"
    tag_cols = ", ".join(
        f"CAST(p.{engine.ident(k)} AS VARCHAR(256)) AS {engine.ident(_tag(i))}"
        if k in pred_cols
        else f"CAST(NULL AS VARCHAR(256)) AS {engine.ident(_tag(i))}"
        for i, k in enumerate(tags)
    )
    delay = (
        "(CASE WHEN e.actual IS NULL THEN NULL ELSE"
        " GREATEST(CAST(0 AS DOUBLE),"
        " ((e.label_us - x.ts) / CAST(1000000 AS DOUBLE)) / CAST(3600 AS DOUBLE)) END)"
    )
    return f"""
    SELECT * FROM (
      SELECT x.hour, x.ts, x.score, x.predicted, e.actual, {delay} AS delay_h{x_tags(tags)}
      FROM (
        SELECT CAST(p.id AS VARCHAR(256)) AS id, {ts} AS ts,
               CAST(FLOOR({ts} / CAST({HOUR_US} AS DOUBLE)) AS INTEGER) AS hour,
               {score} AS score, {predicted} AS predicted{", " + tag_cols if tags else ""}
        FROM predictions p
      ) x LEFT JOIN ({_effective_labels(engine, engine.columns("labels"))}) e ON x.id = e.id
    ) j WHERE {hours.sql()}
    """


def _tag(i: int) -> str:
    return f"tag_{i}"


def x_tags(tags: list[str]) -> str:
    return "".join(f", x.{_tag(i)}" for i in range(len(tags)))


_PARAM = re.compile(r":(pos|neg|cutoff)\b")


def _bind(engine: Engine, sql: str, model: LakeModel, cutoff_us: int | None) -> str:
    values = {"pos": engine.literal(model.pos), "neg": engine.literal(model.neg)}
    if cutoff_us is not None:
        values["cutoff"] = str(cutoff_us)
    return _PARAM.sub(lambda m: values[m[1]], sql)


def _part_sql(
    engine: Engine,
    part: Part,
    model: LakeModel,
    cutoff_us: int | None,
    admitted: list[list[str]],
) -> str:
    """One scan for a part: the whole model and every tag key, by GROUPING SETS (the tag
    keys left out for a part kept for the whole model only)."""
    n = 0 if part.whole_model_only else len(admitted)
    segments = []
    for i in range(n):
        tag = engine.ident(_tag(i))
        listed = ", ".join(engine.literal(v) for v in admitted[i]) or "NULL"
        segments.append(
            f"(CASE WHEN {tag} IN ({listed}) THEN {tag}"
            f" WHEN {tag} IS NOT NULL THEN {engine.literal(OTHER)} END) AS s{i}"
        )
    seg_cols = [f"s{i}" for i in range(n)]
    group_cols = [f"g{i}" for i in range(len(part.group))]
    inner = ", ".join(["*", *segments, *(f"{g} AS g{i}" for i, g in enumerate(part.group))])
    sets = [["hour", *group_cols]] + [["hour", c, *group_cols] for c in seg_cols]
    flags = [f"GROUPING({c}) AS m{i}" for i, c in enumerate(seg_cols)]
    sql = (
        f"SELECT {', '.join(['hour', *flags, *seg_cols, *group_cols, *part.values])}"
        f" FROM (SELECT {inner} FROM joined WHERE {part.where or 'TRUE'}) AS j"
        f" GROUP BY GROUPING SETS ({', '.join('(' + ', '.join(g) + ')' for g in sets)})"
    )
    return engine.portable(_bind(engine, sql, model, cutoff_us))


def _segment_rows(rows: list[tuple[Any, ...]], tags: list[str], n: int) -> list[tuple[Any, ...]]:
    """Grouping-set rows → (hour, segment key, value, *rest); rows of a key whose tag the
    prediction lacks belong to no segment."""
    out = []
    for row in rows:
        flags, values, rest = row[1 : 1 + n], row[1 + n : 1 + 2 * n], row[1 + 2 * n :]
        grouped = [i for i in range(n) if not flags[i]]
        if not grouped:
            out.append((row[0], "", "", *rest))
        elif values[grouped[0]] is not None:
            out.append((row[0], tags[grouped[0]], values[grouped[0]], *rest))
    return out


def compute(
    engine: Engine,
    predictions: Any,
    labels: Any,
    model: LakeModel,
    *,
    now: datetime,
    hours: Hours | None = None,
) -> dict[Key, Totals]:
    """The rollup rows (hour, segment) → totals of the predictions and labels given."""
    hours = hours or Hours()
    engine.register("predictions", predictions)
    engine.register("labels", labels)
    seen = [c for c in engine.columns("predictions") if c not in PREDICTION_COLUMNS]
    tags = model.keys_of(seen)
    admitted = _admitted(engine, tags, model.max_values)
    engine.materialize("joined", engine.portable(_joined(engine, model, tags, hours)))
    cutoff = model.cutoff(now)
    cutoff_us = None if cutoff is None else _epoch_us(cutoff)
    scope = Scope(0, model.binary, model.pos, model.neg, [], cutoff)
    totals: dict[Key, Totals] = defaultdict(Totals)
    values = [admitted[k] for k in tags]
    for part in parts(Dialect(postgres=True), scope):
        n = 0 if part.whole_model_only else len(tags)
        sql = _part_sql(engine, part, model, cutoff_us, values)
        gather(totals, part, _segment_rows(engine.rows(sql), tags, n))
    return dict(totals)


def _admitted(engine: Engine, tags: list[str], max_values: int) -> dict[str, list[str]]:
    cols = engine.columns("predictions")
    out: dict[str, list[str]] = {}
    for key in tags:
        if key not in cols:
            out[key] = []
            continue
        col = engine.ident(key)
        found = engine.rows(
            engine.portable(
                f"SELECT DISTINCT CAST({col} AS VARCHAR(256)) AS v FROM predictions"
                f" WHERE {col} IS NOT NULL"
            )
        )
        out[key] = sorted(str(r[0]) for r in found if r[0] != OTHER)[:max_values]
    return out


def _epoch_us(when: datetime) -> int:
    delta = when - datetime(1970, 1, 1, tzinfo=when.tzinfo)
    return (delta.days * 86400 + delta.seconds) * 1_000_000 + delta.microseconds


def hours_of_labels(engine: Engine, predictions: Any, touched: Any) -> set[int]:
    """The hours of the predictions a batch of labels is for (those to compute again)."""
    engine.register("predictions", predictions)
    engine.register("touched", touched)
    ts = engine.epoch_us("p.ts")
    rows = engine.rows(
        engine.portable(
            f"SELECT DISTINCT CAST(FLOOR({ts} / CAST({HOUR_US} AS DOUBLE)) AS INTEGER)"
            " FROM predictions p"
            " JOIN (SELECT DISTINCT CAST(id AS VARCHAR(256)) AS id FROM touched) t"
            " ON CAST(p.id AS VARCHAR(256)) = t.id"
        )
    )
    return {int(r[0]) for r in rows}


def as_list(paths: str | Iterable[str]) -> list[str]:
    """One path or several, as a list."""
    return [paths] if isinstance(paths, str) else [str(p) for p in paths]
