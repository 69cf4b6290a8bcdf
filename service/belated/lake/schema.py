"""The rollup rows a lake-fed model takes (`PUT /v1/models/{model}/rollups`), as Arrow.

One row per (hour, segment), with every statistic declared in `store/statistics.py` as a
column of its own, so that the format follows the declaration:

- `schema_version` (int): `SCHEMA_VERSION`; a change of the declaration raises it.
- `hour` (timestamp, UTC): the start of the hour, on the hour.
- `seg_key`, `seg_value` (string): ('', '') for the whole model, else one tag key and value.
- each `Scalar`: int64 for a count, float64 for a sum.
- each `Histogram`: its counts as list<int64> over the flattened cells (row-major, exactly
  `n_cells` long), NULL when empty; `<name>_sums` list<float64> beside it where it keeps
  score sums.
- `cells` (string, JSON): the multiclass confusion counts {"[actual, predicted]": n}.

Every hour sent is replaced whole: each hour needs its whole-model row.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import UTC, datetime
from typing import Any

import numpy as np
import orjson
import pyarrow as pa

from belated.store.statistics import CELLS, HISTOGRAMS, SCALARS, Kind
from belated.store.totals import Totals

SCHEMA_VERSION = 1
Key = tuple[int, str, str]
ARROW_STREAM = "application/vnd.apache.arrow.stream"
PARQUET = "application/vnd.apache.parquet"


def sums_column(name: str) -> str:
    """The column of a histogram's score sums."""
    return f"{name}_sums"


def arrow_schema() -> pa.Schema:
    """The Arrow schema of rollup rows, from the declared statistics."""
    fields = [
        pa.field("schema_version", pa.int32(), nullable=False),
        pa.field("hour", pa.timestamp("us", tz="UTC"), nullable=False),
        pa.field("seg_key", pa.string(), nullable=False),
        pa.field("seg_value", pa.string(), nullable=False),
    ]
    for s in SCALARS:
        fields.append(pa.field(s.name, pa.int64() if s.kind is Kind.COUNT else pa.float64(), False))
    for h in HISTOGRAMS:
        fields.append(pa.field(h.name, pa.list_(pa.int64())))
        if h.score_sums:
            fields.append(pa.field(sums_column(h.name), pa.list_(pa.float64())))
    fields.append(pa.field(CELLS, pa.string()))
    return pa.schema(fields)


def to_table(totals: Mapping[Key, Totals]) -> pa.Table:
    """Rollup rows (hour, segment) → an Arrow table in `arrow_schema()`, ordered by key."""
    keys = sorted(totals)
    cols: dict[str, list[Any]] = {f.name: [] for f in arrow_schema()}
    for hour, skey, seg in keys:
        t = totals[(hour, skey, seg)]
        cols["schema_version"].append(SCHEMA_VERSION)
        cols["hour"].append(datetime.fromtimestamp(hour * 3600, UTC))
        cols["seg_key"].append(skey)
        cols["seg_value"].append(seg)
        for s in SCALARS:
            cols[s.name].append(t[s.name])
        for h in HISTOGRAMS:
            has = t.has(h.name)
            cols[h.name].append(t.counts(h.name).reshape(-1).tolist() if has else None)
            if h.score_sums:
                sums = t.sums(h.name).reshape(-1).tolist() if has else None
                cols[sums_column(h.name)].append(sums)
        cols[CELLS].append(orjson.dumps(t.cells).decode() if t.cells else None)
    return pa.table(cols, schema=arrow_schema())


def to_totals(table: pa.Table) -> dict[Key, Totals]:
    """An Arrow table of rollup rows (already validated) → totals per (hour, segment)."""
    out: dict[Key, Totals] = {}
    data = table.to_pydict()
    for i in range(table.num_rows):
        t = Totals()
        t.set_scalars(data[s.name][i] for s in SCALARS)
        for h in HISTOGRAMS:
            counts = data[h.name][i]
            if counts is not None and any(counts):
                t.hist_counts[h.name] = np.asarray(counts, np.int64).reshape(h.shape)
                if h.score_sums:
                    sums = data[sums_column(h.name)][i] or [0.0] * h.n_cells
                    t.hist_sums[h.name] = np.asarray(sums, np.float64).reshape(h.shape)
        cells = data[CELLS][i]
        t.cells = {k: int(v) for k, v in orjson.loads(cells).items()} if cells else None
        out[(hour_of(data["hour"][i]), data["seg_key"][i], data["seg_value"][i])] = t
    return out


def hour_of(value: datetime) -> int:
    """The epoch hour of a timestamp on the hour."""
    stamp = value if value.tzinfo is not None else value.replace(tzinfo=UTC)
    return int(stamp.timestamp()) // 3600


def to_bytes(table: pa.Table, media_type: str = ARROW_STREAM) -> bytes:
    """A table as an upload body: an Arrow IPC stream or a Parquet file."""
    sink = pa.BufferOutputStream()
    if media_type == PARQUET:
        import pyarrow.parquet as pq

        pq.write_table(table, sink, compression="zstd")
    else:
        # dense histograms are mostly zeros: compressed, an hour's row is a few hundred bytes
        options = pa.ipc.IpcWriteOptions(compression="zstd")
        with pa.ipc.new_stream(sink, table.schema, options=options) as writer:
            writer.write_table(table)
    return bytes(sink.getvalue().to_pybytes())
