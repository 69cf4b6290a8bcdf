"""The lake job (issue 17) against belated's own HTTP path, on the same logs in one run.

Logs (bench/lake_data.py, written once under --data and reused): N predictions over DAYS
days, ~0.8 N labels with 5% corrections and 1% orphans, implied negatives after 30 days.
Measured in the same run, each a full run and an incremental day (the labels that arrived
in the last day, plus the hours whose predictions crossed 30 days during it):
- DuckDB and Spark local[*] (bench/lake_engine.py, a child process each): CPU-s (Spark:
  the JVM's too), wall, peak RSS; Spark's rows must equal DuckDB's, the day's rows the full
  run's for the same hours;
- the HTTP path: predictions and the labels up to yesterday POSTed to `belated serve
  --no-jobs` on PostgreSQL over loopback (batches of 10,000, two clients), refreshed at
  yesterday's clock, then the last day's labels and a refresh at today's: CPU-s of the
  service, the refresh child and their PostgreSQL backends; on --http-rows predictions (a
  stated subset, scaled per row in its own line), whose stored rollups must equal DuckDB's
  over the same subset;
- the upload of the rollup rows (PUT /rollups, whole hours) of the full run and of the day.

    nice -n 19 .venv/bin/python bench/lake.py [--rows 10000000] [--http-rows 2000000]
        [--data DIR] [--no-spark] [--no-http] [--reuse]

--reuse takes the engine runs an earlier invocation measured on the same --data logs (each
run's measures are kept beside its rollup Parquet), so a failed HTTP step can be rerun alone.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from bench.common import ROOT, code_version, markdown_table  # noqa: E402
from bench.lake_data import make_logs  # noqa: E402
from bench.lake_service import differences  # noqa: E402

HEADERS = ["path", "run", "rows in", "rollup rows", "CPU-s", "wall s", "rows/s", "peak MiB"]


def engine_run(
    engine: str, mode: str, prefix: str, data: Path, reuse: bool = False
) -> dict[str, Any]:
    """One lake job run in a child process (or, with `reuse`, the one an earlier invocation
    measured on the same logs); its measures and its rollup table."""
    out = data / f"rollups-{engine}-{mode}-{prefix or 'all'}.parquet"
    measured = out.with_suffix(".json")
    if reuse and measured.exists():
        answer: dict[str, Any] = json.loads(measured.read_text())
    else:
        cmd = [sys.executable, "-m", "bench.lake_engine", engine, mode, prefix, str(data), str(out)]
        done = subprocess.run(cmd, cwd=ROOT, stdout=subprocess.PIPE, text=True, check=True)
        answer = json.loads(done.stdout.strip().splitlines()[-1])
        measured.write_text(json.dumps(answer))
    answer["table"] = pq.read_table(out)
    shown = {k: v for k, v in answer.items() if k != "table"}
    print(f"{engine} {mode} {prefix or 'all'}: {shown}", file=sys.stderr, flush=True)
    return answer


def row(path: str, run: str, rows_in: int, r: dict[str, Any], scale: float = 1.0) -> list[Any]:
    """A table row from a measure (CPU and wall multiplied by `scale`)."""
    wall = r["wall"] * scale
    return [
        path,
        run,
        f"{int(rows_in * scale):,}",
        f"{r['rows']:,}" if "rows" in r else "",
        f"{r['cpu'] * scale:.1f}",
        f"{wall:.1f}",
        f"{rows_in * scale / wall:,.0f}" if wall > 0 else "",
        f"{r['peak_mib']:.0f}" if r.get("peak_mib") else "",
    ]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--days", type=int, default=90)
    parser.add_argument("--http-rows", type=int, default=2_000_000)
    parser.add_argument("--data", type=Path, default=None)
    parser.add_argument("--no-spark", action="store_true")
    parser.add_argument("--no-http", action="store_true")
    parser.add_argument(
        "--reuse", action="store_true", help="take engine runs measured before on the same logs"
    )
    args = parser.parse_args()
    from belated.lake.schema import to_totals

    http_rows = min(args.http_rows, args.rows)
    data = args.data or Path(f"/tmp/belated_lake_{args.rows}")
    load0 = os.getloadavg()
    w0 = time.perf_counter()
    info = make_logs(args.rows, args.days, http_rows, data)
    print(f"logs ready in {time.perf_counter() - w0:.1f} s under {data}", file=sys.stderr)
    n, nh = info["counts"]["full"], info["counts"]["http"]
    full_in = n["predictions"] + n["labels"]
    rows: list[list[Any]] = []
    notes: list[str] = []
    runs: dict[str, dict[str, Any]] = {}
    engines = ["duckdb"] + ([] if args.no_spark else ["spark"])
    for eng in engines:
        name = {"duckdb": "DuckDB", "spark": "Spark local[*]"}[eng]
        runs[eng] = engine_run(eng, "full", "", data, args.reuse)
        runs[eng + "-day"] = engine_run(eng, "day", "", data, args.reuse)
        rows.append(row(name, "full", full_in, runs[eng]))
        day = runs[eng + "-day"]
        rows.append(row(name, f"day ({n['labels-day']:,} new labels)", full_in, day))
        full_t, day_t = to_totals(runs[eng]["table"]), to_totals(day["table"])
        bad = differences(day_t, full_t, set(day_t))
        notes.append(f"{name}: the day's {len(day_t):,} rows equal the full run's: {bad == 0}")
        if eng == "spark":
            bad = differences(full_t, to_totals(runs["duckdb"]["table"]))
            notes.append(f"Spark's rows equal DuckDB's: {bad == 0} ({bad} differ)")
            notes.append(f"Spark session start {runs[eng]['start']:.1f} s, apart")
    if not args.no_http:
        from bench.lake_service import http_and_upload

        sub = (
            runs["duckdb"]
            if http_rows == args.rows
            else engine_run("duckdb", "full", "http-", data)
        )
        if http_rows != args.rows:
            rows.append(row("DuckDB", "full, HTTP subset", nh["predictions"] + nh["labels"], sub))
        got = http_and_upload(info, sub["table"], runs["duckdb"], runs["duckdb-day"])
        scale = args.rows / http_rows
        for r in got["rows"]:
            rows.append(row(*r))
        for label, key, rows_in in (
            ("full", "full", nh["predictions"] + nh["labels-base"]),
            ("day", "day", nh["labels-day"]),
        ):
            if scale != 1.0:
                rows.append(
                    row("HTTP", f"{label}, scaled ×{scale:g} per row", rows_in, got[key], scale)
                )
        rows.extend(got["uploads"])
        notes.extend(got["notes"])
    print(markdown_table(HEADERS, rows))
    print(
        f"\n{args.rows:,} predictions over {args.days} days, {n['labels']:,} labels (5%"
        f" corrections, 1% orphans), {n['labels-day']:,} of them in the last day; HTTP on"
        f" {http_rows:,} predictions and their {nh['labels']:,} labels; {os.cpu_count()} CPUs;"
        f" load average {load0[0]:.1f} at the start, {os.getloadavg()[0]:.1f} at the end;"
        f" code {code_version()}"
    )
    for note in notes:
        print(f"- {note}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
