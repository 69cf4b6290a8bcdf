"""Rollup refresh and windowed metrics at scale, on PostgreSQL (issue 4).

Loads N labelled binary predictions over one year (distribution: bench/windows_data.py)
with COPY into a throwaway database, then measures in the same run:
- the full rebuild of every rollup (overall, two tag keys, histograms, delays) through
  belated.store.refresh.rebuild in a child process, against the aggregation floor (one
  hand-written GROUP BY of the overall hourly confusion counts over the same rows) and
  against a hand-written aggregation of everything the rollups hold (GROUPING SETS by week);
- the incremental refresh (refresh_all in a child process) after labels arrive for 1% of
  the rows, spread over the year, through belated.store.labels.ingest in batches of 10,000;
- GET /v1/models/{model}/metrics for 365 daily windows with intervals, over HTTP against
  `belated serve --no-jobs`, before the late labels (1% of each day unlabelled) and after
  them (all labelled), against the same per-day answer recomputed from raw rows with
  pandas, scikit-learn and statsmodels (Wilson intervals);
- peak memory (VmHWM) of the rebuild, refresh and server processes, at N and at N/10 rows.

    .venv/bin/python bench/windows.py [--rows 10000000] [--quick] [--explain] [--keep]

With `--projections` it measures instead the same query with `projected` measures (issue 12):
N rows (default 1,000,000) over the year up to the current hour, with the labels whose time
(prediction + delay) is still to come left out, so the last weeks are unsettled; then
`windows_of_range` in process for the 365 daily windows up to now (fresh session each run:
the arrival curves are fitted every time, as every request does), split into the curve fit,
the projections of the unsettled windows and the rest (the settled windows' work), against
the same call with the curves left out (no projections: the plain alternative), and the HTTP
p50 / p95 of the same query against `belated serve --no-jobs`.

    .venv/bin/python bench/windows.py --projections [--rows 1000000]
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import statistics
import subprocess
import sys
import threading
import time
from datetime import datetime
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import psycopg

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from bench import windows_data as wd  # noqa: E402
from bench.common import (  # noqa: E402
    ROOT,
    Service,
    create_database,
    drop_database,
    markdown_table,
    peak_rss_mib,
    percentile,
    pg_url,
)

FLOOR_SQL = """
SELECT hour,
  count(*) FILTER (WHERE predicted = '1' AND actual = '1'),
  count(*) FILTER (WHERE predicted = '1' AND actual = '0'),
  count(*) FILTER (WHERE predicted = '0' AND actual = '1'),
  count(*) FILTER (WHERE predicted = '0' AND actual = '0')
FROM predictions WHERE model_id = %s GROUP BY hour"""
ROLLUP_SQL = (
    "SELECT start, tp, fp, fn, tn FROM rollups WHERE model_id = %s AND level = 'h' AND seg_key = ''"
)
QUERY = {"granularity": "day", "start": "2025-01-01T00:00:00Z", "end": "2026-01-01T00:00:00Z"}


def run_child(
    mode: str, sa_url: str, model_id: int, explain: bool = False
) -> tuple[dict[str, Any], float]:
    """Run the refresh child; return its JSON answer and its peak RSS (VmHWM) in MiB."""
    cmd = [sys.executable, "-m", "bench.windows_data", mode, sa_url, str(model_id)]
    proc = subprocess.Popen(
        cmd + (["--explain"] if explain else []), cwd=ROOT, stdout=subprocess.PIPE, text=True
    )
    peak = [0.0]

    def poll() -> None:  # VmHWM is a high-water mark: the last read before exit is the peak
        while proc.poll() is None:
            try:
                peak[0] = max(peak[0], peak_rss_mib(proc.pid))
            except (OSError, RuntimeError):
                pass
            time.sleep(0.05)

    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    watcher = threading.Thread(target=poll, daemon=True)
    watcher.start()
    out, _ = proc.communicate()
    watcher.join()
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        raise RuntimeError(f"{mode} child failed ({proc.returncode})")
    answer = json.loads(out.strip().splitlines()[-1])
    # CPU of the child alone (the database server's CPU is not in it): steadier than wall
    # time on a shared machine.
    answer["cpu_s"] = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return answer, peak[0]


def floor(url: str, model_id: int, repeats: int = 3) -> tuple[float, dict[int, tuple]]:
    """Median time of the hand-written overall hourly confusion GROUP BY, and its rows."""
    times, rows = [], []
    with psycopg.connect(url) as conn:
        for _ in range(repeats):
            t0 = time.perf_counter()
            rows = conn.execute(FLOOR_SQL, (model_id,)).fetchall()
            times.append(time.perf_counter() - t0)
    return statistics.median(times), {r[0]: tuple(r[1:]) for r in rows}


def check_rollups(url: str, model_id: int, expected: dict[int, tuple]) -> str:
    """Hours whose overall rollup confusion counts differ from the hand-written GROUP BY."""
    with psycopg.connect(url) as conn:
        got = {r[0]: tuple(r[1:]) for r in conn.execute(ROLLUP_SQL, (model_id,))}
        seg = conn.execute(
            "SELECT seg_key, sum(n_pred) FROM rollups WHERE model_id = %s AND level = 'd'"
            " GROUP BY seg_key ORDER BY seg_key",
            (model_id,),
        ).fetchall()
    bad = sum(got.get(h) != v for h, v in expected.items()) + len(set(got) - set(expected))
    sums = {k or "overall": int(v) for k, v in seg}
    flat = len(set(sums.values())) == 1 and len(sums) == 3
    return f"{bad} bad hours" + ("" if flat else f", daily n_pred by key {sums}")


def latency(service: Service, token: str, n: int = 50) -> tuple[list[float], dict[str, Any], float]:
    """Seconds per metrics request (after 3 warm-ups), the last answer, and the first
    request's seconds (a fresh server: nothing memoised, pools empty)."""
    url = f"{service.url}/v1/models/{wd.MODEL}/metrics"
    times, cold = [], 0.0
    with httpx.Client(headers={"Authorization": f"Bearer {token}"}, timeout=120) as client:
        for i in range(n + 3):
            t0 = time.perf_counter()
            resp = client.get(url, params=QUERY)
            elapsed = time.perf_counter() - t0
            resp.raise_for_status()
            if i >= 3:
                times.append(elapsed)
            elif i == 0:
                cold = elapsed
    return times, resp.json(), cold


def serve_and_time(sa_url: str, token: str) -> tuple[list[float], dict[str, Any], float, float]:
    """Latencies and last answer of the metrics query, the server's peak RSS in MiB, and
    the first request's seconds."""
    service = Service(sa_url, extra_env={"BELATED_LOG_FORMAT": "text"})
    try:
        service.wait_ready()
        times, answer, cold = latency(service, token)
        return times, answer, peak_rss_mib(service.pid), cold
    finally:
        service.stop()


def recompute(url: str, model_id: int) -> dict[int, dict[str, float]]:
    """Per-day counts, precision, recall, F1 (scikit-learn) and Wilson intervals from raw rows."""
    from sklearn.metrics import precision_recall_fscore_support
    from statsmodels.stats.proportion import proportion_confint

    df = wd.copy_rows(url, model_id)
    df["day"] = df["hour"] // 24
    predictions = df.groupby("day").size()
    lab = df[df["actual"].notna()]
    out = {}
    for day, g in lab.groupby("day"):
        y, p = g["actual"].to_numpy().astype(np.int8), g["predicted"].to_numpy()
        prec, rec, f1, _ = precision_recall_fscore_support(
            y, p, average="binary", pos_label=1, zero_division=np.nan
        )
        tp, fp = int(((y == 1) & (p == 1)).sum()), int(((y == 0) & (p == 1)).sum())
        fn = int(((y == 1) & (p == 0)).sum())
        lo, hi = (
            proportion_confint(tp, tp + fp, alpha=0.05, method="wilson")
            if tp + fp
            else (np.nan, np.nan)
        )
        out[int(day)] = {
            "predictions": int(predictions[day]),
            "labelled": len(g),
            "tp": tp,
            "fp": fp,
            "fn": fn,
            "precision": prec,
            "recall": rec,
            "fbeta": f1,
            "precision_low": lo,
            "precision_high": hi,
        }
    return out


def compare(api: dict[str, Any], ref: dict[int, dict[str, float]]) -> str:
    """How far the API's windows are from the recompute (counts exact, measures to 1e-9)."""
    worst, count_bad = 0.0, 0
    for w in api["windows"]:
        day = int(datetime.fromisoformat(w["start"].replace("Z", "+00:00")).timestamp()) // 86400
        r = ref[day]
        c = w["confusion"]
        count_bad += (w["predictions"], w["labelled"], c["tp"], c["fp"], c["fn"]) != (
            r["predictions"],
            r["labelled"],
            r["tp"],
            r["fp"],
            r["fn"],
        )
        m = w["measures"]
        for got, want in (
            (m["precision"]["value"], r["precision"]),
            (m["recall"]["value"], r["recall"]),
            (m["fbeta"]["value"], r["fbeta"]),
            (m["precision"]["low"], r["precision_low"]),
            (m["precision"]["high"], r["precision_high"]),
        ):
            if got is None or want != want:  # undefined (no denominator) must agree
                worst = max(worst, 0.0 if got is None and want != want else math.inf)
            else:
                worst = max(worst, abs(got - want))
    return f"{len(api['windows'])} days, {count_bad} count mismatches, max diff {worst:.1e}"


def run_scale(n: int, recomputes: int, explain: bool, keep: bool = False) -> dict[str, Any]:
    """Every measurement at one data size, in a database of its own."""
    res: dict[str, Any] = {"rows": n}
    name = create_database("belated_bench_windows")
    url = pg_url(name)
    sa_url = url.replace("postgresql://", "postgresql+psycopg://")
    try:
        model_id, token = wd.setup_tenant(sa_url)
        t0 = time.perf_counter()
        data = wd.generate(n)
        wd.load(url, model_id, data)
        res["load_s"] = time.perf_counter() - t0
        res["prevalence"] = float(data.actual.mean())
        res["pred_pos"] = float((data.score >= 0.5).mean())
        res["floor_s"], expected = floor(url, model_id)
        res["same_s"] = wd.same_content(url, model_id)
        res["rebuild"], res["rebuild_mib"] = run_child("rebuild", sa_url, model_id)
        res["check_rebuild"] = check_rollups(url, model_id, expected)
        # Before the late labels every day still has unlabelled predictions (1%), which the
        # label-free estimates work on; after them the year is fully labelled.
        res["lat_early"], _, res["server_early_mib"], res["cold_early"] = serve_and_time(
            sa_url, token
        )
        res["ingest_s"], res["ingest"] = wd.ingest_labels(sa_url, model_id, data)
        with psycopg.connect(url) as conn:
            res["dirty"] = conn.execute("SELECT count(*) FROM dirty_buckets").fetchone()[0]
        res["refresh"], res["refresh_mib"] = run_child("refresh", sa_url, model_id)
        res["floor2_s"], expected = floor(url, model_id, repeats=1)
        res["check_refresh"] = check_rollups(url, model_id, expected)
        res["lat"], answer, res["server_mib"], res["cold"] = serve_and_time(sa_url, token)
        times, ref = [], {}
        for _ in range(recomputes):
            t0 = time.perf_counter()
            ref = recompute(url, model_id)
            times.append(time.perf_counter() - t0)
        res["recompute_s"] = statistics.median(times)
        res["check_api"] = compare(answer, ref)
        if explain:
            res["plans"] = run_child("rebuild", sa_url, model_id, explain=True)[0]["plans"]
    finally:
        if keep:
            print(f"kept database {name}", file=sys.stderr)
        else:
            drop_database(name)
    brief = {k: v for k, v in res.items() if k not in ("plans", "lat", "lat_early")}
    print(json.dumps(brief, default=str), file=sys.stderr, flush=True)
    return res


def _ok(flag: bool) -> str:
    return "met" if flag else "MISSED"


def table(small: dict[str, Any], big: dict[str, Any]) -> str:
    """The markdown table of both scales, with targets for the main scale."""

    def both(fn: Any) -> list[str]:
        return [fn(small), fn(big)]

    rb = lambda r: r["rebuild"]["seconds"]  # noqa: E731
    inc = lambda r: r["refresh"]["seconds"]  # noqa: E731
    p50 = lambda r: percentile(r["lat"], 0.5)  # noqa: E731
    p95 = lambda r: percentile(r["lat"], 0.95)  # noqa: E731

    def peak(r: dict[str, Any]) -> float:
        return max(r["rebuild_mib"], r["refresh_mib"], r["server_mib"], r["server_early_mib"])

    rows = [
        ["rows loaded (COPY, not a target)", *both(lambda r: f"{r['rows']:,}"), "", ""],
        ["load + index build, s (not a target)", *both(lambda r: f"{r['load_s']:.1f}"), "", ""],
        [
            "aggregation floor: overall hourly confusion GROUP BY, s (median of 3)",
            *both(lambda r: f"{r['floor_s']:.2f}"),
            "",
            "",
        ],
        ["full rebuild (refresh.rebuild), s", *both(lambda r: f"{rb(r):.1f}"), "", ""],
        [
            "full rebuild, CPU s of the child process",
            *both(lambda r: f"{r['rebuild']['cpu_s']:.1f}"),
            "",
            "",
        ],
        [
            "rebuild / floor",
            *both(lambda r: f"{rb(r) / r['floor_s']:.1f}x"),
            "<= 4x",
            _ok(rb(big) / big["floor_s"] <= 4),
        ],
        [
            "hand-written aggregation of all rollup content (GROUPING SETS by week), s",
            *both(lambda r: f"{r['same_s']:.1f}"),
            "",
            "",
        ],
        [
            "rebuild / hand-written all-content aggregation",
            *both(lambda r: f"{rb(r) / r['same_s']:.1f}x"),
            "",
            "",
        ],
        ["rebuild rows/s", *both(lambda r: f"{r['rows'] / rb(r):,.0f}"), "", ""],
        [
            "label ingest of 1% (labels.ingest, 10k batches), s",
            *both(lambda r: f"{r['ingest_s']:.1f}"),
            "",
            "",
        ],
        ["dirty hour buckets after the labels", *both(lambda r: f"{r['dirty']:,}"), "", ""],
        ["incremental refresh (refresh_all), s", *both(lambda r: f"{inc(r):.1f}"), "", ""],
        [
            "incremental refresh, CPU s of the child process",
            *both(lambda r: f"{r['refresh']['cpu_s']:.1f}"),
            "",
            "",
        ],
        [
            "incremental / full rebuild",
            *both(lambda r: f"{100 * inc(r) / rb(r):.0f}%"),
            "<= 5%",
            _ok(inc(big) / rb(big) <= 0.05),
        ],
        [
            "metrics, 365 daily windows, 1% unlabelled, p50 ms (50 requests)",
            *both(lambda r: f"{1000 * percentile(r['lat_early'], 0.5):.0f}"),
            "",
            "",
        ],
        [
            "metrics, 365 daily windows, 1% unlabelled, p95 ms",
            *both(lambda r: f"{1000 * percentile(r['lat_early'], 0.95):.0f}"),
            "< 100 ms",
            _ok(percentile(big["lat_early"], 0.95) < 0.1),
        ],
        [
            "metrics, 365 daily windows, first request on a fresh server, ms (1% unlabelled /"
            " all labelled)",
            *both(lambda r: f"{1000 * r['cold_early']:.0f} / {1000 * r['cold']:.0f}"),
            "",
            "",
        ],
        [
            "metrics, 365 daily windows, all labelled, p50 ms (50 requests)",
            *both(lambda r: f"{1000 * p50(r):.0f}"),
            "",
            "",
        ],
        [
            "metrics, 365 daily windows, all labelled, p95 ms",
            *both(lambda r: f"{1000 * p95(r):.0f}"),
            "< 100 ms",
            _ok(p95(big) < 0.1),
        ],
        [
            "recompute pandas + scikit-learn from raw rows, s (median)",
            *both(lambda r: f"{r['recompute_s']:.2f}"),
            "",
            "",
        ],
        [
            "recompute / metrics p50 (all labelled)",
            *both(lambda r: f"{r['recompute_s'] / p50(r):.0f}x"),
            ">= 100x",
            _ok(big["recompute_s"] / p50(big) >= 100),
        ],
        [
            "recompute / metrics p95 (all labelled)",
            *both(lambda r: f"{r['recompute_s'] / p95(r):.0f}x"),
            "",
            "",
        ],
        ["peak RSS rebuild child, MiB", *both(lambda r: f"{r['rebuild_mib']:.0f}"), "", ""],
        ["peak RSS refresh child, MiB", *both(lambda r: f"{r['refresh_mib']:.0f}"), "", ""],
        [
            "peak RSS server after queries, MiB",
            *both(lambda r: f"{max(r['server_mib'], r['server_early_mib']):.0f}"),
            "",
            "",
        ],
        [
            "largest peak RSS, MiB",
            *both(lambda r: f"{peak(r):.0f}"),
            "< 500, flat",
            _ok(peak(big) < 500 and peak(big) < 1.25 * peak(small)),
        ],
        ["check: rollups after rebuild vs floor", *both(lambda r: r["check_rebuild"]), "", ""],
        ["check: rollups after refresh vs floor", *both(lambda r: r["check_refresh"]), "", ""],
        ["check: API vs recompute", *both(lambda r: r["check_api"]), "", ""],
    ]
    head = ["measure", f"{small['rows']:,} rows", f"{big['rows']:,} rows", "target", "verdict"]
    return markdown_table(head, rows)


def breakdown(res: dict[str, Any]) -> str:
    """Where the rebuild and the refresh spend their time, by kind of SQL statement."""
    kinds = sorted(set(res["rebuild"]["sql"]) | set(res["refresh"]["sql"]))
    rows = []
    for label, key in (("rebuild", "rebuild"), ("refresh_all", "refresh")):
        total = res[key]["seconds"]
        sql = res[key]["sql"]
        in_sql = sum(v["seconds"] for v in sql.values())
        for k in kinds:
            v = sql.get(k, {"seconds": 0.0, "calls": 0})
            rows.append(
                [label, k, v["calls"], f"{v['seconds']:.1f}", f"{100 * v['seconds'] / total:.0f}%"]
            )
        rows.append(
            [
                label,
                "Python outside SQL (accumulate, pack)",
                "-",
                f"{total - in_sql:.1f}",
                f"{100 * (total - in_sql) / total:.0f}%",
            ]
        )
    return markdown_table(["run", "statement kind", "calls", "seconds", "share"], rows)


def run_projections(n: int, repeats: int = 7, requests: int = 30) -> None:
    """The metrics query with projections, in process and over HTTP; prints a table."""
    from datetime import UTC, timedelta

    from sqlalchemy import select

    import belated.metrics.windows as mw
    from belated.metrics import arrival
    from belated.metrics.params import Range
    from belated.store.db import make_engine, make_sessionmaker
    from belated.store.tables import ModelRow

    now = datetime.now(UTC).replace(minute=0, second=0, microsecond=0)
    end = now.replace(hour=0) + timedelta(days=1)
    start = end - timedelta(days=365)
    name = create_database("belated_bench_projections")
    url = pg_url(name)
    sa_url = url.replace("postgresql://", "postgresql+psycopg://")
    try:
        model_id, token = wd.setup_tenant(sa_url)
        data = wd.generate(n)
        data.ts = data.ts + (now.timestamp() - wd.YEAR_START.timestamp() - wd.YEAR_SECONDS)
        to_come = np.flatnonzero(data.ts + data.delay_h * 3600 > now.timestamp())
        data.late = np.union1d(data.late, to_come)
        t0 = time.perf_counter()
        wd.load(url, model_id, data)
        rebuild, _ = run_child("rebuild", sa_url, model_id)
        load_s = time.perf_counter() - t0
        engine = make_engine(sa_url)
        factory = make_sessionmaker(engine)
        spent: dict[str, float] = {"fit": 0.0, "project": 0.0}
        real_fit, real_projected, real_curves_of = arrival._fit_on, mw.projected, mw.curves_of

        def timed(key: str, fn: Any) -> Any:
            def run(*a: Any, **k: Any) -> Any:
                t = time.perf_counter()
                try:
                    return fn(*a, **k)
                finally:
                    spent[key] += time.perf_counter() - t

            return run

        def no_curves(*_a: Any, **_k: Any) -> None:
            return None

        arrival._fit_on = timed("fit", real_fit)  # type: ignore[assignment]
        mw.projected = timed("project", real_projected)  # type: ignore[assignment]
        rng = Range("day", start, end)
        runs: dict[str, list[dict[str, float]]] = {"with": [], "without": []}
        n_projected = n_windows = 0
        for i in range(repeats + 1):
            for mode in ("with", "without"):
                mw.curves_of = real_curves_of if mode == "with" else no_curves
                spent.update(fit=0.0, project=0.0)
                with factory() as session:
                    model = session.scalars(select(ModelRow).where(ModelRow.id == model_id)).one()
                    t = time.perf_counter()
                    windows = mw.windows_of_range(
                        session, model, rng, mw.MeasureOptions(), (), now, 100
                    )
                    total = time.perf_counter() - t
                if i:  # the first round warms the memos and the pool
                    runs[mode].append({"total": total, **spent})
                if mode == "with":
                    n_windows = len(windows)
                    n_projected = sum(w["projected"] is not None for w in windows)
        mw.curves_of, arrival._fit_on, mw.projected = real_curves_of, real_fit, real_projected
        engine.dispose()
        service = Service(sa_url, extra_env={"BELATED_LOG_FORMAT": "text"})
        lat: list[float] = []
        try:
            service.wait_ready()
            params = {"granularity": "day", "start": start.isoformat(), "end": end.isoformat()}
            headers = {"Authorization": f"Bearer {token}"}
            with httpx.Client(headers=headers, timeout=120) as client:
                for i in range(requests + 3):
                    t = time.perf_counter()
                    resp = client.get(f"{service.url}/v1/models/{wd.MODEL}/metrics", params=params)
                    resp.raise_for_status()
                    if i >= 3:
                        lat.append(time.perf_counter() - t)
            http_projected = sum(w["projected"] is not None for w in resp.json()["windows"])
        finally:
            service.stop()
    finally:
        drop_database(name)

    def med(mode: str, key: str) -> float:
        return 1000 * statistics.median(r[key] for r in runs[mode])

    with_total, without_total = med("with", "total"), med("without", "total")
    fit, project = med("with", "fit"), med("with", "project")
    rows = [
        ["365 daily windows in process, with projections (median ms)", f"{with_total:.0f}"],
        ["  fitting the arrival curves (once per request)", f"{fit:.0f}"],
        [f"  projecting the {n_projected} unsettled windows", f"{project:.0f}"],
        [
            f"  the rest: the {n_windows - n_projected} settled windows' measures",
            f"{with_total - fit - project:.0f}",
        ],
        ["the same without curves (no projections; plain alternative)", f"{without_total:.0f}"],
        ["ratio with / without", f"{with_total / without_total:.2f}x"],
        [f"over HTTP, p50 ({requests} requests, {http_projected} projected)", ""],
        ["  p50 ms", f"{1000 * percentile(lat, 0.5):.0f}"],
        ["  p95 ms", f"{1000 * percentile(lat, 0.95):.0f}"],
    ]
    print(
        f"\n## Metrics with projections ({n:,} predictions, {len(to_come):,} labels still to"
        f" come, load and rebuild {load_s:.0f} s, rebuild {rebuild['seconds']:.0f} s;"
        f" {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f})\n"
    )
    print(markdown_table(["measure", "figure"], rows))


def main() -> None:
    """Parse options, run both scales, print the tables."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--quick", action="store_true", help="1,000,000 rows")
    ap.add_argument(
        "--compare-rows",
        type=int,
        default=None,
        help="the smaller size for the memory comparison (default rows/10)",
    )
    ap.add_argument("--recomputes", type=int, default=3)
    ap.add_argument(
        "--keep",
        action="store_true",
        help="keep the main size's database for inspection (drop it yourself)",
    )
    ap.add_argument(
        "--explain",
        action="store_true",
        help="also print EXPLAIN ANALYZE of the product's queries (main size)",
    )
    ap.add_argument(
        "--projections",
        action="store_true",
        help="time the query with projected measures instead (default 1,000,000 rows)",
    )
    args = ap.parse_args()
    if args.projections:
        run_projections(args.rows if args.rows != 10_000_000 else 1_000_000)
        return
    rows = 1_000_000 if args.quick else args.rows
    t0 = time.perf_counter()
    small = run_scale(args.compare_rows or rows // 10, args.recomputes, False)
    big = run_scale(rows, args.recomputes, args.explain, args.keep)
    rev = subprocess.run(
        ["git", "describe", "--always", "--dirty"], cwd=ROOT, capture_output=True, text=True
    ).stdout.strip()
    print(
        f"\n## Rollups and windows at scale (PostgreSQL, {os.cpu_count()} cores,"
        f" product at {rev}, load average {os.getloadavg()[0]:.1f})\n"
    )
    print(
        f"Data: prevalence {big['prevalence']:.3f}, predicted positive rate "
        f"{big['pred_pos']:.3f}, 1% labelled late; label ingest answer {big['ingest']}.\n"
    )
    print(table(small, big))
    print(f"\n### Where the time goes at {rows:,} rows (time inside each kind of statement)\n")
    print(breakdown(big))
    for kind, plan in (big.get("plans") or {}).items():
        print(f"\n### EXPLAIN ANALYZE: {kind}\n\n```\n{plan}\n```")
    print(f"\nwhole run {time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    main()
