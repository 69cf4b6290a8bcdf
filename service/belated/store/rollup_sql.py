"""The GROUP BY queries that turn raw prediction rows into rollup statistics.

Each query runs in the database on both stores; only aggregated rows come back. The
effective actual class of a row is its label, or the negative class when the model has
`negative_after_days` and the prediction is older than that without a label (an implied
negative, counted apart).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np
from sqlalchemy import bindparam, text
from sqlalchemy.orm import Session

from belated.stats.delays import LAST_DELAY_BIN

EPS = float(np.finfo(np.float64).eps)


@dataclass(frozen=True)
class Scope:
    """What one refresh query covers: a model, its classes, a set of hours, the implied cutoff."""

    model_id: int
    binary: bool
    pos: str
    neg: str
    hours: Sequence[int] | range
    cutoff: datetime | None
    filters: tuple[tuple[str, str], ...] = ()
    # aggregate logged label changes (old state weighted -1, new state +1) instead of rows
    changes: bool = False


class _Dialect:
    def __init__(self, session: Session) -> None:
        self.pg = session.get_bind().dialect.name == "postgresql"

    def least(self, a: str, b: str) -> str:
        return f"LEAST({a}, {b})" if self.pg else f"min({a}, {b})"

    def greatest(self, a: str, b: str) -> str:
        return f"GREATEST({a}, {b})" if self.pg else f"max({a}, {b})"

    def floor_int(self, a: str) -> str:
        # every argument here is non-negative, where SQLite's truncating cast is floor
        return f"CAST(floor({a}) AS INTEGER)" if self.pg else f"CAST({a} AS INTEGER)"

    def tag(self, key: str) -> str:
        return _tag_sql(self.pg, "", key).replace(":fk", ":tag_key").replace(":fp", ":tag_path")


def _cutoff_param(session: Session, cutoff: datetime) -> Any:
    if session.get_bind().dialect.name == "postgresql":
        return cutoff
    return cutoff.strftime("%Y-%m-%d %H:%M:%S.%f")  # the text form SQLAlchemy stores


def _plain(key: str) -> bool:
    return not any(c in key for c in '"\\') and all(ord(c) >= 32 for c in key)


def _tag_sql(pg: bool, i: int | str, key: str = "") -> str:
    if pg:
        return f"(tags ->> :fk{i})"
    if _plain(key):
        return f"json_extract(tags, :fp{i})"
    # a key with quotes, backslashes or control characters cannot be spelled in a path
    return f"(SELECT j.value FROM json_each(predictions.tags) AS j WHERE j.key = :fk{i})"


def _json_path(key: str) -> str:
    return '$."' + key.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _hour_filter(scope: Scope) -> str:
    if isinstance(scope.hours, range):
        return f"model_id = :m AND hour >= {scope.hours.start} AND hour < {scope.hours.stop}"
    return f"model_id = :m AND hour IN ({','.join(str(int(h)) for h in scope.hours)})"


def _where(scope: Scope, pg: bool = False) -> str:
    where = _hour_filter(scope)
    for i, (key, _) in enumerate(scope.filters):  # several tags at once: from raw rows
        where += f" AND {_tag_sql(pg, i, key)} = :fv{i}"
    return where


def _actual(scope: Scope) -> tuple[str, str]:
    if scope.changes:
        # a change's old state was an implied negative if its hour was aggregated with a
        # cutoff after it, whatever the model's setting is now
        cut = "cut IS NOT NULL AND ts <= cut"
    elif scope.cutoff is None:
        return "actual", "0"
    else:
        cut = "ts <= :cutoff"
    eff = f"(CASE WHEN actual IS NOT NULL THEN actual WHEN {cut} THEN :neg END)"
    implied = f"(CASE WHEN actual IS NULL AND {cut} THEN 1 ELSE 0 END)"
    return eff, implied


def _source(scope: Scope) -> tuple[str, str, str]:
    """The FROM clause, the weight of a row, and the row count, for rows or for changes."""
    if not scope.changes:
        return "predictions", "1", "COUNT(*)"
    hours = _hour_filter(scope)
    side = (
        "SELECT row_id, {w} AS w, {p}_actual AS actual, {p}_delay_h AS delay_h"
        f" FROM label_changes WHERE {hours}"
    )
    # the cutoff by a lookup per row: with the change log not yet analysed, a join let
    # PostgreSQL scan every hourly rollup row of the model for each change
    src = f"""(SELECT p.model_id, p.hour, p.ts, p.score, p.predicted, p.tags, c.actual,
          c.delay_h, c.w,
          (SELECT r.cut FROM rollups r WHERE r.model_id = :m AND r.level = 'h'
             AND r.start = p.hour AND r.seg_key = '' AND r.seg_value = '') AS cut
        FROM ({side.format(w=-1, p="old")} UNION ALL {side.format(w=1, p="new")}) AS c
        JOIN predictions p ON p.row_id = c.row_id) AS predictions"""
    return src, "w", "SUM(w)"


def _segment(d: _Dialect, key: str | None) -> tuple[str, str]:
    if key is None:
        return "''", ""
    t = d.tag(key)
    return (f"(CASE WHEN {t} IN :tag_values THEN {t} ELSE '(other)' END)", f" AND {t} IS NOT NULL")


def _params(
    session: Session, scope: Scope, key: str | None, values: Sequence[str]
) -> dict[str, Any]:
    params: dict[str, Any] = {"m": scope.model_id, "pos": scope.pos, "neg": scope.neg}
    if scope.cutoff is not None:
        params["cutoff"] = _cutoff_param(session, scope.cutoff)
    if key is not None:
        params["tag_key"] = key
        params["tag_path"] = _json_path(key)
        params["tag_values"] = list(values) or ["\x01none"]
    for i, (fk, fv) in enumerate(scope.filters):
        params[f"fk{i}"], params[f"fp{i}"], params[f"fv{i}"] = fk, _json_path(fk), fv
    return params


def _run(session: Session, sql: str, params: dict[str, Any], key: str | None) -> list[Any]:
    stmt = text(sql)
    if key is not None:
        stmt = stmt.bindparams(bindparam("tag_values", expanding=True))
    return list(session.execute(stmt, params))


SCALARS = (
    "n_pred",
    "n_labelled",
    "n_implied",
    "n_pred_pos",
    "tp",
    "fp",
    "fn",
    "tn",
    "brier_sum",
    "logloss_sum",
    "exp_tp",
    "exp_fp",
    "exp_fn",
    "exp_tn",
)


def _scalar_cols(d: _Dialect, scope: Scope) -> str:
    a, implied = _actual(scope)
    _, w, count = _source(scope)
    m = "" if w == "1" else f"{w} * "
    pp = "predicted = :pos"
    if scope.binary:
        clip = d.greatest(d.least("score", str(1 - EPS)), str(EPS))
        label_cols = f"""
          SUM(CASE WHEN {pp} AND {a} = :pos THEN {w} ELSE 0 END),
          SUM(CASE WHEN {pp} AND {a} = :neg THEN {w} ELSE 0 END),
          SUM(CASE WHEN NOT ({pp}) AND {a} = :pos THEN {w} ELSE 0 END),
          SUM(CASE WHEN NOT ({pp}) AND {a} = :neg THEN {w} ELSE 0 END),
          SUM(CASE WHEN {a} = :pos THEN {m}(1 - score) * (1 - score)
                   WHEN {a} = :neg THEN {m}score * score ELSE 0 END),
          SUM(CASE WHEN {a} = :pos THEN {m}(-ln({clip}))
                   WHEN {a} = :neg THEN {m}(-ln(1 - {clip})) ELSE 0 END),
          SUM(CASE WHEN {pp} THEN {m}score ELSE 0 END),
          SUM(CASE WHEN {pp} THEN {m}(1 - score) ELSE 0 END),
          SUM(CASE WHEN NOT ({pp}) THEN {m}score ELSE 0 END),
          SUM(CASE WHEN NOT ({pp}) THEN {m}(1 - score) ELSE 0 END)"""
    else:
        label_cols = ", ".join(["0"] * 4 + ["0.0"] * 6)
    labelled = f"COUNT({a})" if w == "1" else f"SUM(CASE WHEN {a} IS NOT NULL THEN w ELSE 0 END)"
    return (
        f"{count}, {labelled}, SUM({m}{implied}),"
        f" SUM(CASE WHEN {pp} THEN {w} ELSE 0 END), {label_cols}"
    )


def _hist_parts(d: _Dialect, scope: Scope) -> tuple[list[str], str, str]:
    a, _ = _actual(scope)
    cls = f"(CASE WHEN {a} = :pos THEN 0 WHEN {a} IS NOT NULL THEN 1 ELSE 2 END)"
    bin_ = d.least(d.floor_int("score * 100"), "99")
    _, w, count = _source(scope)
    ssum = "SUM(score)" if w == "1" else f"SUM({w} * score)"
    return [cls, bin_], f"{count}, {ssum}", " AND score IS NOT NULL"


def _cell_parts(scope: Scope) -> tuple[list[str], str, str]:
    _, _, count = _source(scope)
    return ["actual", "predicted"], count, " AND actual IS NOT NULL"


def _per_key(
    session: Session,
    scope: Scope,
    key: str | None,
    values: Sequence[str],
    extra: list[str],
    cols: str,
    where: str,
) -> list[Any]:
    d = _Dialect(session)
    seg, seg_where = _segment(d, key)
    src, _, _ = _source(scope)
    lead = ", ".join(["hour", seg, *extra])
    sql = f"""
        SELECT {lead}, {cols}
        FROM {src} WHERE {_where(scope, d.pg)}{seg_where}{where}
        GROUP BY {", ".join(str(i + 1) for i in range(2 + len(extra)))}"""
    return _run(session, sql, _params(session, scope, key, values), key)


def scalars(session: Session, scope: Scope, key: str | None, values: Sequence[str]) -> list[Any]:
    """Rows of (hour, segment value, *SCALARS) for the whole model or one tag key."""
    return _per_key(session, scope, key, values, [], _scalar_cols(_Dialect(session), scope), "")


def histograms(session: Session, scope: Scope, key: str | None, values: Sequence[str]) -> list[Any]:
    """Rows of (hour, segment value, class 0/1/2 = pos/neg/unlabelled, bin, count, score sum)."""
    extra, cols, where = _hist_parts(_Dialect(session), scope)
    return _per_key(session, scope, key, values, extra, cols, where)


def cells(session: Session, scope: Scope, key: str | None, values: Sequence[str]) -> list[Any]:
    """Rows of (hour, segment value, actual, predicted, count) over labelled predictions."""
    extra, cols, where = _cell_parts(scope)
    return _per_key(session, scope, key, values, extra, cols, where)


def grouped(
    session: Session, scope: Scope, keys: dict[str, list[str]], what: str
) -> list[tuple[Any, ...]]:
    """One PostgreSQL scan for the whole model and every tag key (GROUPING SETS).

    `what` is 'scalars', 'histograms' or 'cells'. Rows are (hour, segment key, segment
    value, *the per-key function's columns after the segment value).
    """
    d = _Dialect(session)
    assert d.pg
    extra: list[str]
    if what == "scalars":
        extra, cols, where = [], _scalar_cols(d, scope), ""
    elif what == "histograms":
        extra, cols, where = _hist_parts(d, scope)
    else:
        extra, cols, where = _cell_parts(scope)
    names = list(keys)
    segs = [
        f"(CASE WHEN (tags ->> :k{i}) IN :v{i} THEN (tags ->> :k{i})"
        f" WHEN (tags ->> :k{i}) IS NOT NULL THEN '(other)' END) AS s{i}"
        for i in range(len(names))
    ]
    inner = ", ".join([*segs, *(f"{e} AS e{i}" for i, e in enumerate(extra))])
    s_list = [f"s{i}" for i in range(len(names))]
    e_list = [f"e{i}" for i in range(len(extra))]
    sets = ", ".join(
        f"({', '.join(['hour', *group, *e_list])})" for group in [[], *([s] for s in s_list)]
    )
    src, _, _ = _source(scope)
    sql = f"""
        SELECT {", ".join(["hour", f"GROUPING({', '.join(s_list)})", *s_list, *e_list])},
          {cols}
        FROM (SELECT *, {inner} FROM {src} WHERE {_where(scope, True)}{where}) AS predictions
        GROUP BY GROUPING SETS ({sets})"""
    params = _params(session, scope, None, ())
    stmt = text(sql)
    for i, key in enumerate(names):
        params[f"k{i}"], params[f"v{i}"] = key, list(keys[key]) or ["\x01none"]
        stmt = stmt.bindparams(bindparam(f"v{i}", expanding=True))
    n = len(names)
    out: list[tuple[Any, ...]] = []
    for row in session.execute(stmt, params):
        g, rest = row[1], tuple(row[2 + n :])
        if g == (1 << n) - 1:
            out.append((row[0], "", "", *rest))
            continue
        i = next(i for i in range(n) if not g & (1 << (n - 1 - i)))
        if row[2 + i] is not None:  # predictions without the tag are in no segment of it
            out.append((row[0], names[i], row[2 + i], *rest))
    return out


def delays(session: Session, scope: Scope) -> list[Any]:
    """Rows of (hour, delay bin, count) over explicitly labelled predictions."""
    d = _Dialect(session)
    h = "delay_h"
    bin_ = (
        f"(CASE WHEN {h} < 48 THEN {d.floor_int(h)}"
        f" WHEN {h} < 168 THEN 48 + {d.floor_int(f'({h} - 48) / 6')}"
        f" ELSE {d.least('68 + ' + d.floor_int(f'({h} - 168) / 24'), str(LAST_DELAY_BIN))}"
        " END)"
    )
    src, _, count = _source(scope)
    sql = f"""
        SELECT hour, {bin_}, {count} FROM {src}
        WHERE {_where(scope, d.pg)} AND actual IS NOT NULL AND delay_h IS NOT NULL
        GROUP BY 1, 2"""
    return list(session.execute(text(sql), _params(session, scope, None, ())))
