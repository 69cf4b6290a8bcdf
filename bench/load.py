"""Concurrent ingest load: eight writer processes against one `belated serve`, per store.

Each writer (a process with its own HTTP client) posts batches of 50 predictions of an online
furniture shop and labels for most of them: labels before their predictions, racing them in
concurrent requests, deliberate repeats of whole batches, and corrections; a 503 with
Retry-After is honoured and retried. The service runs its jobs (refresh every
--refresh-seconds). The same writer code is run once more with one writer for
--baseline-seconds: the plain alternative, measured in the same run, that the eight are
compared with. Latency is per HTTP request, client side.

    .venv/bin/python bench/load.py [--seconds 60] [--baseline-seconds 20] [--stores ...]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
from bench.common import markdown_table, peak_rss_mib, percentile  # noqa: E402
from tests.reliability.procs import (  # noqa: E402
    LoadPlan,
    Service,
    create_model,
    create_token,
    make_store,
    run_writers,
)

MODEL = "returns-bench"


def measure(kind: str, writers: int, seconds: float, refresh: float) -> dict[str, Any]:
    """One run on a fresh store: n writers for `seconds`; figures from their logs."""
    with (
        tempfile.TemporaryDirectory(prefix="belated_load_") as tmp,
        make_store(kind, Path(tmp)) as store,
    ):
        token = create_token(store)
        service = Service(store, Path(tmp), jobs=True, refresh_seconds=refresh)
        try:
            create_model(service.url, token, MODEL)
            plan = LoadPlan(
                url=service.url,
                token=token,
                model=MODEL,
                seconds=seconds,
                end_hour=int(time.time() // 3600),
            )
            logs = run_writers(plan, Path(tmp), n=writers)
            rss = peak_rss_mib(service.proc.pid)
        finally:
            service.stop()
    requests = [r for log in logs for r in log["requests"]]
    ok = [r for r in requests if 200 <= r[1] < 300]
    elapsed = statistics.median(log["elapsed"] for log in logs)
    latencies = [r[2] * 1000 for r in requests]
    errors = Counter(str(r[1]) if r[1] else "no answer" for r in requests if not 200 <= r[1] < 300)
    return {
        "writers": writers,
        "seconds": elapsed,
        "requests": len(requests),
        "req_s": len(requests) / elapsed,
        "rows_s": sum(r[4] for r in ok) / elapsed,
        "new_s": sum(log["accepted"] for log in logs) / elapsed,
        "p50": percentile(latencies, 0.50),
        "p95": percentile(latencies, 0.95),
        "p99": percentile(latencies, 0.99),
        "errors": errors,
        "rss": rss,
        "failures": sum(len(log["failures"]) for log in logs),
    }


def row(m: dict[str, Any]) -> list[Any]:
    """One table row."""
    errors = ", ".join(f"{k}: {v}" for k, v in sorted(m["errors"].items())) or "none"
    return [
        m["writers"],
        f"{m['seconds']:.1f}",
        m["requests"],
        f"{m['req_s']:.1f}",
        f"{m['rows_s']:.0f}",
        f"{m['new_s']:.0f}",
        f"{m['p50']:.0f}",
        f"{m['p95']:.0f}",
        f"{m['p99']:.0f}",
        errors,
        f"{m['rss']:.0f}",
    ]


HEADERS = [
    "writers",
    "seconds",
    "requests",
    "requests/s",
    "rows/s",
    "new predictions/s",
    "p50 ms",
    "p95 ms",
    "p99 ms",
    "errors (by status)",
    "service peak RSS MiB",
]


def main() -> None:
    """Run the load on each store and print a table per store."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--baseline-seconds", type=float, default=20.0)
    ap.add_argument("--writers", type=int, default=8)
    ap.add_argument("--refresh-seconds", type=float, default=5.0)
    ap.add_argument("--stores", default="postgresql,sqlite")
    args = ap.parse_args()
    for kind in args.stores.split(","):
        many = measure(kind, args.writers, args.seconds, args.refresh_seconds)
        one = measure(kind, 1, args.baseline_seconds, args.refresh_seconds)
        print(
            f"\n### {kind}: {args.writers} writers for {args.seconds:.0f} s, "
            f"1 writer for {args.baseline_seconds:.0f} s\n"
        )
        print(markdown_table(HEADERS, [row(many), row(one)]))
        print(
            f"\nrows/s, {args.writers} writers against 1: {many['rows_s'] / one['rows_s']:.2f}x;"
            f" p50 latency: {many['p50'] / one['p50']:.2f}x"
        )
        if many["failures"] or one["failures"]:
            print(f"client-side failures logged: {many['failures'] + one['failures']}")


if __name__ == "__main__":
    main()
