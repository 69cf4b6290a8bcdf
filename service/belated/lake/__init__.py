"""The lake job: rollup rows computed where the prediction and label logs live.

`build(predictions, labels, model, engine="duckdb" | "spark")` returns the rollup rows of a
lake-fed model (`belated.lake.schema`, an Arrow table) from a predictions table and a labels
table (Parquet paths; for Spark also DataFrames), with every statistic derived from the
declaration the store uses (`store/statistics.py`). `belated lake run` runs it and uploads
the rows (`PUT /v1/models/{model}/rollups`).
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

import pyarrow as pa

from belated.lake.job import Engine, Hours, compute, hours_of_labels
from belated.lake.schema import to_table
from belated.lake.settings import LakeModel
from belated.store.rollups import Key
from belated.store.totals import Totals

ENGINES = ("duckdb", "spark")


def engine_named(name: str, **options: Any) -> Engine:
    """A fresh engine by name ("duckdb" or "spark")."""
    if name == "duckdb":
        from belated.lake.duck import DuckEngine

        return DuckEngine(**options)
    if name == "spark":
        from belated.lake.spark import SparkEngine

        spark: Engine = SparkEngine(**options)
        return spark
    raise ValueError(f"engine must be one of {ENGINES}, not {name!r}")


def build_totals(
    predictions: Any,
    labels: Any,
    model: LakeModel,
    *,
    now: datetime,
    engine: str | Engine = "duckdb",
    since_hour: int | None = None,
    hours: set[int] | None = None,
) -> dict[Key, Totals]:
    """Rollup totals per (hour, segment): all hours, those from `since_hour` on, and/or only
    `hours` (the hours new labels touched)."""
    eng = engine_named(engine) if isinstance(engine, str) else engine
    try:
        only = frozenset(hours) if hours is not None else None
        return compute(eng, predictions, labels, model, now=now, hours=Hours(since_hour, only))
    finally:
        if isinstance(engine, str):
            eng.close()


def build(
    predictions: Any,
    labels: Any,
    model: LakeModel,
    *,
    now: datetime,
    engine: str | Engine = "duckdb",
    since_hour: int | None = None,
    hours: set[int] | None = None,
) -> pa.Table:
    """The rollup rows as an Arrow table in the upload schema."""
    totals = build_totals(
        predictions, labels, model, now=now, engine=engine, since_hour=since_hour, hours=hours
    )
    return to_table(totals)


def touched_hours(
    predictions: Any, touched_labels: Any, engine: str | Engine = "duckdb"
) -> set[int]:
    """The hours of the predictions that a batch of new labels is for."""
    eng = engine_named(engine) if isinstance(engine, str) else engine
    try:
        return hours_of_labels(eng, predictions, touched_labels)
    finally:
        if isinstance(engine, str):
            eng.close()


__all__ = ["ENGINES", "LakeModel", "build", "build_totals", "engine_named", "touched_hours"]
