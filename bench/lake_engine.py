"""One measured lake job run of bench/lake.py, in a process of its own (so its peak memory
is its own, not the data generator's):

    python -m bench.lake_engine duckdb|spark full|day PREFIX DATA_DIR OUT.parquet

`full`: every hour from the predictions and all labels. `day`: the incremental day, the
hours the last day's labels are for plus the hours whose predictions crossed
`negative_after_days` during that day (as `belated lake run --touched-by` computes them),
from all labels. Writes the rollup rows to OUT and prints one JSON line: CPU-s (this process
and, for Spark, the JVM), wall s, rows, hours, peak RSS MiB (VmHWM, this process plus the
JVM), and Spark's session start (apart).
"""

from __future__ import annotations

import json
import resource
import sys
import time
from pathlib import Path
from typing import Any

import pyarrow.parquet as pq

from bench.common import cpu_seconds, peak_rss_mib
from bench.lake_data import NOW, paths

SETTINGS: dict[str, Any] = {
    "kind": "binary",
    "classes": ["kept", "returned"],
    "positive": "returned",
    "threshold": 0.4,
    "negative_after_days": 30,
}


def _self_cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def measure(engine_name: str, mode: str, files: dict[str, str], out: str) -> dict[str, Any]:
    """Run the job once and measure it."""
    import os

    from belated.lake import LakeModel, build, engine_named, touched_hours
    from belated.lake.run import crossed_hours

    model = LakeModel.of(SETTINGS)
    s0 = time.perf_counter()
    engine: Any = engine_named(engine_name)
    start = time.perf_counter() - s0
    jvm = engine.spark.sparkContext._gateway.proc.pid if engine_name == "spark" else None

    def cpu() -> float:
        return _self_cpu() + (cpu_seconds(jvm) if jvm is not None else 0.0)

    c0, w0 = cpu(), time.perf_counter()
    hours = None
    if mode == "day":
        hours = touched_hours(files["predictions"], files["labels-day"], engine=engine)
        hours |= crossed_hours(model, NOW, 24.0)
    table = build(files["predictions"], files["labels"], model, now=NOW, engine=engine, hours=hours)
    wall, used = time.perf_counter() - w0, cpu() - c0
    peak = peak_rss_mib(os.getpid()) + (peak_rss_mib(jvm) if jvm is not None else 0.0)
    engine.close()
    pq.write_table(table, out)
    return {
        "cpu": used,
        "wall": wall,
        "rows": table.num_rows,
        "hours": len(set(table.column("hour").to_pylist())),
        "peak_mib": peak,
        "start": start,
    }


if __name__ == "__main__":
    _engine, _mode, _prefix, _dir, _out = sys.argv[1:6]
    print(json.dumps(measure(_engine, _mode, paths(Path(_dir), _prefix), _out)))
