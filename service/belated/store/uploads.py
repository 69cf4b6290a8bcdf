"""Rollup rows uploaded for a lake-fed model: validated whole, then whole hours replaced.

A lake-fed model (`source` "lake") keeps no raw rows: its hourly rollup rows are computed
where the team's logs live (belated.lake) and uploaded in the format of
`belated.lake.schema`. An upload is checked whole before anything is written (the schema
version, the model's classes and segment keys, counts non-negative and consistent with one
another, histograms of the declared sizes, hours on the hour); the first bad row and field
is named and nothing is stored. Then, in the caller's transaction, every hour it holds is
replaced (all its rows: an hour sent is whole), the daily rows above are summed again, and
the segment keys and values it names are admitted.
"""

from __future__ import annotations

import io
import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import orjson
import pyarrow as pa
from sqlalchemy.orm import Session

from belated.clock import now
from belated.errors import Invalid, field_error
from belated.lake.schema import (
    ARROW_STREAM,
    PARQUET,
    SCHEMA_VERSION,
    Key,
    arrow_schema,
    sums_column,
    to_totals,
)
from belated.store import rollups
from belated.store.rollup_tables import SegmentKey, SegmentValue
from belated.store.segments import MAX_KEYS, OTHER, admitted
from belated.store.statistics import CELLS, HISTOGRAMS, SCALARS, SCORE_CLASSES, Kind
from belated.store.tables import ModelRow
from belated.store.totals import Totals

_HOUR_NS = 3_600_000_000_000


class _Bad(Exception):
    def __init__(self, row: int | None, field: str, reason: str) -> None:
        super().__init__(reason)
        self.row, self.field, self.reason = row, field, reason


def _refuse(row: int | None, field: str, reason: str) -> Invalid:
    where = f"row {row}" if row is not None else "the upload"
    return Invalid(
        [field_error(row, field, reason)],
        detail=f"{where}, field '{field}': {reason}. Nothing was stored.",
    )


def read_table(body: bytes, media_type: str) -> pa.Table:
    """The upload body as an Arrow table: an Arrow IPC stream or a Parquet file."""
    kind = media_type.split(";")[0].strip().lower()
    try:
        if kind == PARQUET or kind == "application/x-parquet":
            import pyarrow.parquet as pq

            return pq.read_table(io.BytesIO(body))
        if kind == ARROW_STREAM:
            return pa.ipc.open_stream(body).read_all()
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise _refuse(None, "body", f"not a readable {kind} body ({exc})") from None
    raise _refuse(
        None,
        "content-type",
        f"send {ARROW_STREAM} (an Arrow IPC stream) or {PARQUET}, not {media_type!r}",
    )


def _conform(table: pa.Table) -> pa.Table:
    """The table in the declared schema's column order and types; a missing column or one
    of another type is refused before any row is read."""
    schema = arrow_schema()
    extra = [n for n in table.column_names if n not in schema.names]
    if extra:
        raise _refuse(None, extra[0], "not a column of the rollup schema")
    cols = []
    for field in schema:
        if field.name not in table.column_names:
            if field.nullable:
                cols.append(pa.nulls(table.num_rows, field.type))
                continue
            raise _refuse(None, field.name, "missing column of the rollup schema")
        col = table.column(field.name)
        if field.name == "hour":
            if not pa.types.is_timestamp(col.type):
                raise _refuse(None, "hour", f"must be a timestamp, not {col.type}")
            cols.append(col)
            continue
        try:
            cols.append(col.cast(field.type))
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            raise _refuse(None, field.name, f"must be {field.type}, not {col.type}") from None
    return pa.table(dict(zip(schema.names, cols, strict=True)))


def _hours_ns(col: Any) -> list[int | None]:
    unit = col.type.unit
    scale = {"s": 10**9, "ms": 10**6, "us": 10**3, "ns": 1}[unit]
    ints = col.cast(pa.int64()).to_pylist()
    return [None if v is None else v * scale for v in ints]


def validate(model: ModelRow, table: pa.Table, max_values: int, stored_keys: list[str]) -> pa.Table:
    """The upload in the declared schema, or an Invalid naming its first bad row and field."""
    if table.num_rows == 0:
        raise _refuse(None, "body", "no rollup rows")
    hours_ns = _hours_ns(table.column("hour"))
    conformed = _conform(table)
    data = conformed.to_pydict()
    binary = model.kind == "binary"
    classes = set(model.classes)
    allowed = list(model.segment_keys) if model.segment_keys is not None else None
    keys_seen = list(stored_keys)
    values_seen: dict[str, set[str]] = {}
    seen: set[Key] = set()
    whole: set[int] = set()
    hours: set[int] = set()
    try:
        for i in range(conformed.num_rows):
            hour = _check_row(i, data, hours_ns[i], binary, classes)
            skey, seg = data["seg_key"][i], data["seg_value"][i]
            if skey == "" or seg == "":
                if skey != "" or seg != "":
                    raise _Bad(
                        i,
                        "seg_value" if skey else "seg_key",
                        "both empty (the whole model) or both set",
                    )
                whole.add(hour)
            else:
                if allowed is not None and skey not in allowed:
                    raise _Bad(
                        i, "seg_key", f"{skey!r} is not one of the model's segment_keys {allowed}"
                    )
                if skey not in keys_seen:
                    if allowed is None and len(keys_seen) >= MAX_KEYS:
                        raise _Bad(
                            i,
                            "seg_key",
                            f"{skey!r} would be tag key {MAX_KEYS + 1};"
                            f" a model keeps rollups for at most {MAX_KEYS}",
                        )
                    keys_seen.append(skey)
                if len(seg) > 64 or len(skey) > 64 or ":" in skey:
                    raise _Bad(
                        i,
                        "seg_key",
                        "tag keys are 1-64 characters without ':', values 1-64 characters",
                    )
                vals = values_seen.setdefault(skey, set())
                vals.add(seg)
                if len(vals - {OTHER}) > max_values:
                    raise _Bad(
                        i,
                        "seg_value",
                        f"more than {max_values} values of {skey!r}"
                        f" (the rest roll up under {OTHER!r})",
                    )
                for h in HISTOGRAMS:
                    if h.whole_model_only and data[h.name][i] is not None:
                        raise _Bad(i, h.name, "kept for the whole model only: NULL for a segment")
            key = (hour, skey, seg)
            if key in seen:
                raise _Bad(i, "seg_value", "a second row of the same hour and segment")
            seen.add(key)
            hours.add(hour)
        for i in range(conformed.num_rows):
            hour = int(hours_ns[i] or 0) // _HOUR_NS
            if hour not in whole:
                raise _Bad(
                    i, "seg_key", "its hour has no whole-model row ('', ''): an hour is sent whole"
                )
    except _Bad as bad:
        raise _refuse(bad.row, bad.field, bad.reason) from None
    return conformed


def _check_row(
    i: int, data: dict[str, list[Any]], hour_ns: int | None, binary: bool, classes: set[str]
) -> int:
    if data["schema_version"][i] != SCHEMA_VERSION:
        raise _Bad(
            i,
            "schema_version",
            f"{data['schema_version'][i]} is not the version this server reads ({SCHEMA_VERSION})",
        )
    if hour_ns is None or hour_ns % _HOUR_NS != 0:
        raise _Bad(i, "hour", "not on the hour (minutes, seconds and fractions must be 0)")
    v: dict[str, Any] = {}
    for s in SCALARS:
        x = data[s.name][i]
        if s.kind is Kind.COUNT:
            if x < 0:
                raise _Bad(i, s.name, f"negative count {x}")
        elif not math.isfinite(x) or (s.nonnegative and x < 0):
            raise _Bad(
                i, s.name, f"{x} is not a finite{' non-negative' if s.nonnegative else ''} sum"
            )
        if not binary and s.binary_only and x != 0:
            raise _Bad(i, s.name, "a multiclass model keeps no binary statistic: 0")
        v[s.name] = x
    if v["n_labelled"] > v["n_pred"]:
        raise _Bad(i, "n_labelled", f"{v['n_labelled']} labelled of {v['n_pred']} predictions")
    if v["n_implied"] > v["n_labelled"]:
        raise _Bad(i, "n_implied", f"{v['n_implied']} implied of {v['n_labelled']} labelled")
    if v["n_pred_pos"] > v["n_pred"]:
        raise _Bad(
            i, "n_pred_pos", f"{v['n_pred_pos']} predicted positives of {v['n_pred']} predictions"
        )
    if binary:
        confusion = v["tp"] + v["fp"] + v["fn"] + v["tn"]
        if confusion != v["n_labelled"]:
            raise _Bad(
                i, "tp", f"tp + fp + fn + tn = {confusion}, not n_labelled {v['n_labelled']}"
            )
        if v["tp"] + v["fp"] > v["n_pred_pos"]:
            raise _Bad(i, "fp", "tp + fp exceeds the predicted positives")
    explicit = v["n_labelled"] - v["n_implied"]
    for h in HISTOGRAMS:
        counts = data[h.name][i]
        sums = data[sums_column(h.name)][i] if h.score_sums else None
        if counts is None:
            if sums is not None and any(sums):
                raise _Bad(i, sums_column(h.name), "score sums without counts")
            continue
        if not binary and h.binary_only:
            raise _Bad(i, h.name, "a multiclass model keeps no binary histogram: NULL")
        if len(counts) != h.n_cells or any(c is None for c in counts):
            raise _Bad(
                i, h.name, f"{len(counts)} cells, not the declared {h.n_cells} (shape {h.shape})"
            )
        arr = np.asarray(counts, np.int64)
        if (arr < 0).any():
            raise _Bad(i, h.name, f"negative count in cell {int(np.flatnonzero(arr < 0)[0])}")
        if sums is not None:
            if len(sums) != h.n_cells or not all(s is not None and math.isfinite(s) for s in sums):
                raise _Bad(i, sums_column(h.name), f"not {h.n_cells} finite sums")
        grid = arr.reshape(h.shape)
        if h.name == "hist":
            expect = (v["tp"] + v["fn"], v["fp"] + v["tn"], v["n_pred"] - v["n_labelled"])
            got = tuple(int(x) for x in grid.sum(axis=1))
            for cls, e, g in zip(SCORE_CLASSES, expect, got, strict=True):
                if e != g:
                    raise _Bad(i, h.name, f"{g} {cls} scores, not the {e} the counts say")
        elif int(arr.sum()) > explicit:
            raise _Bad(i, h.name, f"{int(arr.sum())} delays of {explicit} explicit labels")
    cells = data[CELLS][i]
    if cells is not None:
        if binary:
            raise _Bad(i, CELLS, "a binary model keeps its confusion in tp, fp, fn, tn: NULL")
        # the cells count explicit labels (as the store's refresh does), not implied negatives
        _check_cells(i, cells, classes, explicit)
    elif not binary and explicit:
        raise _Bad(i, CELLS, f"no confusion cells for {explicit} explicitly labelled predictions")
    assert hour_ns is not None
    return hour_ns // _HOUR_NS


def _check_cells(i: int, cells: str, classes: set[str], labelled: int) -> None:
    try:
        parsed = orjson.loads(cells)
        assert isinstance(parsed, dict)
        total = 0
        for k, n in parsed.items():
            actual, predicted = orjson.loads(k)
            for c in (actual, predicted):
                if c not in classes:
                    raise _Bad(i, CELLS, f"class {c!r} is not one of the model's {sorted(classes)}")
            if not isinstance(n, int) or n < 0:
                raise _Bad(i, CELLS, f"cell {k} holds {n!r}, not a non-negative count")
            total += n
    except (orjson.JSONDecodeError, AssertionError, ValueError, TypeError):
        raise _Bad(i, CELLS, 'not a JSON map {"[actual, predicted]": count}') from None
    if total != labelled:
        raise _Bad(i, CELLS, f"cells add up to {total}, not the {labelled} explicit labels")


def store(*, session: Session, model: ModelRow, table: pa.Table, max_values: int) -> dict[str, int]:
    """Validate an upload whole, then replace its hours; the hours and rows written."""
    stored = admitted(session=session, model_id=model.id)
    checked = validate(model, table, max_values, list(stored))
    totals = to_totals(checked)
    hours = sorted({k[0] for k in totals})
    _admit(session, model, totals, stored)
    rollups.replace_hours(session=session, model_id=model.id, hours=hours, totals=totals)
    return {"hours": len(hours), "rows": len(totals)}


def _admit(
    session: Session, model: ModelRow, totals: dict[Key, Totals], stored: dict[str, list[str]]
) -> None:
    stamp = now()
    for _, skey, seg in sorted(totals):
        if not skey:
            continue
        if skey not in stored:
            session.add(SegmentKey(model_id=model.id, key=skey, admitted_at=stamp))
            stored[skey] = []
        if seg != OTHER and seg not in stored[skey]:
            session.add(SegmentValue(model_id=model.id, key=skey, value=seg, admitted_at=stamp))
            stored[skey].append(seg)
    session.flush()


__all__: Sequence[str] = ("read_table", "store", "validate")
