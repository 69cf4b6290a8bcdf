"""The lake job (issue 17): rollup rows of N predictions computed on DuckDB and on Spark
local mode, and uploaded to a lake-fed model on PostgreSQL.

Data (seeded numpy PCG64): N orders uniform over DAYS days, scores Beta(2, 5), two tag keys
(region in four values, channel in two); 80% labelled after an exponential delay (mean
72 h), 5% of those corrected later, 1% of labels for orders that never existed; Parquet
files as a team's log would hold them. Measured in the same run:
- a full run (every hour) on DuckDB, in this process: CPU-s (process user + system) and wall;
- an incremental run: a second label batch correcting orders of 2% of the hours, only the
  hours it touched (`--touched-by`), on DuckDB;
- the same full and incremental runs on Spark local[*]: CPU-s of the JVM (/proc), wall,
  and the session start apart; the rows must equal DuckDB's (counts exactly, sums 1e-9);
- the upload of the full run's rows to `belated serve --no-jobs` on PostgreSQL (PUT
  /rollups in pieces of whole hours): wall and the service's CPU-s.

    .venv/bin/python bench/lake.py [--rows 1000000] [--days 90] [--no-spark]
"""

from __future__ import annotations

import argparse
import math
import os
import resource
import sys
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from belated.client import Client  # noqa: E402
from belated.lake import LakeModel, build_totals, touched_hours  # noqa: E402
from belated.lake.run import chunks  # noqa: E402
from belated.lake.schema import ARROW_STREAM, to_bytes, to_table  # noqa: E402
from bench.common import (  # noqa: E402
    Service,
    code_version,
    cpu_seconds,
    create_database,
    drop_database,
    markdown_table,
    pg_url,
    setup_store,
)

NOW = datetime(2026, 12, 1, tzinfo=UTC)
SETTINGS: dict[str, Any] = {
    "kind": "binary",
    "classes": ["kept", "returned"],
    "positive": "returned",
    "threshold": 0.4,
    "negative_after_days": 30,
}


def ts_array(us: np.ndarray) -> pa.Array:
    return pa.array(us.astype("datetime64[us]"), pa.timestamp("us")).cast(pa.timestamp("us", "UTC"))


def make_logs(rows: int, days: int, where: Path, seed: int = 17) -> dict[str, str]:
    """Write predictions, labels and a late label batch as Parquet; their paths."""
    rng = np.random.default_rng(seed)
    end_us = int(NOW.timestamp() * 1e6)
    ts = end_us - rng.integers(0, days * 86_400_000_000, rows)
    score = rng.beta(2, 5, rows)
    ids = np.char.add("o", np.arange(rows).astype(str))
    pq.write_table(
        pa.table(
            {
                "id": ids,
                "ts": ts_array(ts),
                "score": score,
                "region": rng.choice(["north", "south", "east", "west"], rows),
                "channel": rng.choice(["web", "store"], rows),
            }
        ),
        where / "predictions.parquet",
    )
    labelled = np.flatnonzero(rng.random(rows) < 0.8)
    outcome = np.where(rng.random(labelled.size) < score[labelled], "returned", "kept")
    label_ts = ts[labelled] + rng.exponential(72 * 3.6e9, labelled.size).astype(np.int64)
    keep = label_ts <= end_us
    labelled, outcome, label_ts = labelled[keep], outcome[keep], label_ts[keep]
    fix = rng.random(labelled.size) < 0.05
    fixed_ts = np.minimum(label_ts[fix] + 3_600_000_000 * 24, end_us)
    orphans = max(1, labelled.size // 100)
    lab_ids = np.concatenate(
        [ids[labelled], ids[labelled[fix]], np.char.add("ghost", np.arange(orphans).astype(str))]
    )
    lab_actual = np.concatenate(
        [outcome, np.where(outcome[fix] == "kept", "returned", "kept"), np.full(orphans, "kept")]
    )
    lab_ts = np.concatenate([label_ts, fixed_ts, np.full(orphans, end_us - 3_600_000_000)])
    pq.write_table(
        pa.table({"id": lab_ids, "actual": lab_actual, "ts": ts_array(lab_ts)}),
        where / "labels.parquet",
    )
    # the late batch: corrections of orders in 2% of the hours, at NOW
    hours = ts // 3_600_000_000
    distinct = np.unique(hours)
    chosen = rng.choice(distinct, max(1, distinct.size // 50), replace=False)
    late = np.flatnonzero(np.isin(hours, chosen))
    late_ts = np.full(late.size, end_us)
    late_actual = np.where(rng.random(late.size) < 0.5, "returned", "kept")
    late_table = pa.table({"id": ids[late], "actual": late_actual, "ts": ts_array(late_ts)})
    pq.write_table(late_table, where / "late.parquet")
    all_labels = pa.concat_tables([pq.read_table(where / "labels.parquet"), late_table])
    pq.write_table(all_labels, where / "labels-all.parquet")
    return {k: str(where / f"{k}.parquet") for k in ("predictions", "labels", "late", "labels-all")}


def self_cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def timed(run: Any, cpu: Any) -> tuple[Any, float, float]:
    c0, w0 = cpu(), time.perf_counter()
    out = run()
    return out, cpu() - c0, time.perf_counter() - w0


def same(a: dict[Any, Any], b: dict[Any, Any]) -> bool:
    if sorted(a) != sorted(b):
        return False
    for k in a:
        if a[k].scalar_counts.tolist() != b[k].scalar_counts.tolist():
            return False
        for x, y in zip(a[k].scalar_sums, b[k].scalar_sums, strict=True):
            if not math.isclose(x, y, rel_tol=1e-9, abs_tol=1e-12):
                return False
    return True


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--days", type=int, default=90)
    parser.add_argument("--no-spark", action="store_true")
    args = parser.parse_args()
    model = LakeModel.of(SETTINGS)
    where = Path(tempfile.mkdtemp(prefix="belated_lake_"))
    w0 = time.perf_counter()
    paths = make_logs(args.rows, args.days, where)
    print(f"data written in {time.perf_counter() - w0:.1f} s to {where}", file=sys.stderr)
    n_labels = pq.read_metadata(paths["labels"]).num_rows
    n_late = pq.read_metadata(paths["late"]).num_rows
    results: list[list[Any]] = []

    def run_engine(name: str, engine: Any, cpu: Any) -> dict[Any, Any]:
        full, c, w = timed(
            lambda: build_totals(
                paths["predictions"], paths["labels"], model, now=NOW, engine=engine
            ),
            cpu,
        )
        results.append([name, "full", f"{args.rows:,}", len(full), f"{c:.1f}", f"{w:.1f}"])

        def incremental() -> dict[Any, Any]:
            hours = touched_hours(paths["predictions"], paths["late"], engine=engine)
            return build_totals(
                paths["predictions"],
                paths["labels-all"],
                model,
                now=NOW,
                engine=engine,
                hours=hours,
            )

        part, c, w = timed(incremental, cpu)
        results.append(
            [
                name,
                f"incremental ({n_late:,} labels)",
                f"{args.rows:,}",
                len(part),
                f"{c:.1f}",
                f"{w:.1f}",
            ]
        )
        return full

    duck = run_engine("DuckDB", "duckdb", self_cpu)
    spark_start = 0.0
    if not args.no_spark:
        from belated.lake.spark import SparkEngine

        s0 = time.perf_counter()
        eng = SparkEngine()
        spark_start = time.perf_counter() - s0
        jvm = eng.spark.sparkContext._gateway.proc.pid
        spark = run_engine("Spark local[*]", eng, lambda: cpu_seconds(jvm) + self_cpu())
        eng.close()
        assert same(spark, duck), "Spark and DuckDB rows differ"
    # the upload
    dbname = create_database("belated_bench_lake")
    service = None
    try:
        url = pg_url(dbname)
        token, _ = setup_store(url)
        service = Service(url)
        service.wait_ready()
        table = to_table(duck)
        with Client(service.url, token) as client:
            client.create_model(
                name="returns-lake", source="lake", **{k: v for k, v in SETTINGS.items()}
            )
            bodies = [to_bytes(p, ARROW_STREAM) for p in chunks(table)]
            c0, w0 = cpu_seconds(service.pid), time.perf_counter()
            for body in bodies:
                client.put_rollups("returns-lake", body, ARROW_STREAM)
            up_wall, up_cpu = time.perf_counter() - w0, cpu_seconds(service.pid) - c0
        results.append(
            [
                "upload (PUT /rollups)",
                f"{len(bodies)} requests, {sum(map(len, bodies)) / 2**20:.1f} MiB",
                "",
                table.num_rows,
                f"{up_cpu:.1f} (service)",
                f"{up_wall:.1f}",
            ]
        )
    finally:
        if service is not None:
            service.stop()
        drop_database(dbname)
    print(
        markdown_table(["engine", "run", "predictions", "rollup rows", "CPU-s", "wall s"], results)
    )
    print(
        f"\n{args.rows:,} predictions over {args.days} days, {n_labels:,} labels"
        f" (5% corrections, 1% orphans), two tag keys; Spark session start"
        f" {spark_start:.1f} s (apart); {os.cpu_count()} CPUs; code {code_version()};"
        f" rows equal between engines: {'yes' if not args.no_spark else 'not run'}"
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
