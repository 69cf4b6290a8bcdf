"""Run the lake job for a model and upload its rows (or write them as Parquet)."""

from __future__ import annotations

from collections.abc import Iterator
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import pyarrow as pa

from belated.lake import build, touched_hours
from belated.lake.schema import ARROW_STREAM, to_bytes
from belated.lake.settings import LakeModel

ROWS_PER_UPLOAD = 5000  # rows of whole hours per PUT (compressed, well under the body limit)


def chunks(table: pa.Table, rows: int = ROWS_PER_UPLOAD) -> Iterator[pa.Table]:
    """The table in pieces of whole hours, each of at most `rows` rows (or one hour)."""
    table = table.sort_by([("hour", "ascending")])
    hours = table.column("hour").to_pylist()
    start = 0
    while start < len(hours):
        end = start
        while end < len(hours):
            nxt = end
            while nxt < len(hours) and hours[nxt] == hours[end]:
                nxt += 1
            if nxt - start > rows and end > start:
                break
            end = nxt
        yield table.slice(start, end - start)
        start = end


def crossed_hours(model: LakeModel, now: datetime, every_hours: float) -> set[int]:
    """The hours whose unlabelled predictions became implied negatives since a run
    `every_hours` ago (the cutoff moved past them): an incremental run computes them too."""
    cutoff = model.cutoff(now)
    if cutoff is None:
        return set()
    last = int((cutoff - timedelta(hours=every_hours)).timestamp()) // 3600
    return set(range(last, int(cutoff.timestamp()) // 3600 + 1))


def run(
    *,
    client: Any,
    model_name: str,
    predictions: Any,
    labels: Any,
    engine: str,
    now: datetime,
    since_hour: int | None = None,
    touched_by: Any = None,
    out: Path | None = None,
    max_values: int = 100,
    every_hours: float = 24.0,
) -> dict[str, Any]:
    """Compute the model's rollup rows (all hours, from `since_hour`, or the hours the
    labels in `touched_by` are for, with the hours whose predictions crossed
    `negative_after_days` since a run `every_hours` ago) and upload them, or write them
    under `out`."""
    model = LakeModel.of(client.model(model_name), max_values=max_values)
    hours = None
    if touched_by is not None:
        hours = touched_hours(predictions, touched_by, engine=engine) | crossed_hours(
            model, now, every_hours
        )
    table = build(
        predictions, labels, model, now=now, engine=engine, since_hour=since_hour, hours=hours
    )
    n_hours = len(set(table.column("hour").to_pylist()))
    if out is not None:
        import pyarrow.parquet as pq

        out.mkdir(parents=True, exist_ok=True)
        path = out / f"{model_name}-rollups.parquet"
        pq.write_table(table, path, compression="zstd")
        return {"hours": n_hours, "rows": table.num_rows, "written": str(path)}
    uploads = 0
    for piece in chunks(table):
        client.put_rollups(model_name, to_bytes(piece, ARROW_STREAM), ARROW_STREAM)
        uploads += 1
    return {"hours": n_hours, "rows": table.num_rows, "uploads": uploads}
