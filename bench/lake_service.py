"""The service side of bench/lake.py: the HTTP path (ingest and refresh) on the subset, and
the upload of the lake job's rollup rows, against one `belated serve --no-jobs` on a
throwaway PostgreSQL database."""

from __future__ import annotations

import math
import time
from datetime import timedelta
from typing import Any

import pyarrow as pa

from bench.common import (
    Service,
    cpu_seconds,
    create_database,
    drop_database,
    peak_rss_mib,
    pg_url,
    setup_store,
)
from bench.lake_data import NOW
from bench.lake_engine import SETTINGS
from bench.lake_http import db_cpu, label_waves, post_all, prediction_bodies, run_refresh


def differences(a: Any, b: Any, only: set[Any] | None = None) -> int:
    """Rollup rows (dicts of key → Totals) that differ: counts exactly, sums 1e-9 relative."""
    keys = set(a) | set(b) if only is None else only
    bad = 0
    for k in keys:
        x, y = a.get(k), b.get(k)
        if x is None or y is None or x.scalar_counts.tolist() != y.scalar_counts.tolist():
            bad += 1
            continue
        sums = zip(x.scalar_sums.tolist(), y.scalar_sums.tolist(), strict=True)
        hists = set(x.hist_counts) | set(y.hist_counts)
        if not all(math.isclose(p, q, rel_tol=1e-9, abs_tol=1e-12) for p, q in sums) or any(
            x.counts(h).tolist() != y.counts(h).tolist() for h in hists
        ):
            bad += 1
    return bad


def stored(sa_url: str, model: str) -> dict[Any, Any]:
    """The stored hourly rollup rows of a model."""
    from sqlalchemy import create_engine, select

    from belated.store.rollup_tables import Rollup
    from belated.store.tables import ModelRow
    from belated.store.totals import Totals

    engine = create_engine(sa_url)
    with engine.connect() as conn:
        mid = conn.execute(select(ModelRow.id).where(ModelRow.name == model)).scalar_one()
        rows = conn.execute(
            select(Rollup.__table__).where(Rollup.model_id == mid, Rollup.level == "h")
        ).all()
    engine.dispose()
    return {(r.start, r.seg_key, r.seg_value): Totals.from_row(r) for r in rows}


def _sum(*parts: dict[str, float]) -> dict[str, float]:
    return {
        "wall": sum(p["wall"] for p in parts),
        "cpu": sum(p["cpu"] for p in parts),
        "peak_mib": max(p.get("peak_mib", 0.0) for p in parts),
    }


def _refresh(sa_url: str, when: Any, dbname: str) -> dict[str, float]:
    r = run_refresh(sa_url, when.isoformat(), dbname)
    r["cpu"] = r["own_cpu"] + r["db_cpu"]
    return r


def _upload(url: str, token: str, table: pa.Table, dbname: str, pid: int) -> dict[str, Any]:
    from belated.client import Client
    from belated.lake.run import chunks
    from belated.lake.schema import ARROW_STREAM, to_bytes

    bodies = [to_bytes(p, ARROW_STREAM) for p in chunks(table)]
    db0, c0, w0 = db_cpu(dbname), cpu_seconds(pid), time.perf_counter()
    with Client(url, token) as client:
        for body in bodies:
            client.put_rollups("returns-lake", body, ARROW_STREAM)
    wall = time.perf_counter() - w0
    db = sum(c - db0.get(p, 0.0) for p, c in db_cpu(dbname).items())
    mib = sum(map(len, bodies)) / 2**20
    return {"wall": wall, "cpu": cpu_seconds(pid) - c0 + db, "requests": len(bodies), "mib": mib}


def http_and_upload(
    info: dict[str, Any], expected: pa.Table, full: dict[str, Any], day: dict[str, Any]
) -> dict[str, Any]:
    """Measure the HTTP path on the subset and the uploads of the full run's and the day's
    rollup rows; check the HTTP path's rollups against `expected` (DuckDB on the subset)."""
    from belated.client import Client
    from belated.lake.schema import to_totals

    files = info["http"]
    t0 = time.perf_counter()
    preds = [prediction_bodies(files["predictions"])]
    base, last = label_waves(files["labels-base"]), label_waves(files["labels-day"])
    print(f"HTTP bodies built in {time.perf_counter() - t0:.1f} s", flush=True)
    dbname = create_database("belated_bench_lake")
    service = None
    url = pg_url(dbname)
    sa_url = url.replace("postgresql://", "postgresql+psycopg://", 1)
    try:
        token, _ = setup_store(url)
        service = Service(url)
        service.wait_ready()
        with Client(service.url, token) as client:
            client.create_model(name="returns-http", **SETTINGS)
            client.create_model(name="returns-lake", source="lake", **SETTINGS)
        path = "/v1/models/returns-http/"
        ing_p = post_all(service.url, token, path + "predictions", preds, dbname, service.pid)
        ing_l = post_all(service.url, token, path + "labels", base, dbname, service.pid)
        ref_full = _refresh(sa_url, NOW - timedelta(days=1), dbname)
        ing_d = post_all(service.url, token, path + "labels", last, dbname, service.pid)
        ref_day = _refresh(sa_url, NOW, dbname)
        ingest_mib = peak_rss_mib(service.pid)
        bad = differences(stored(sa_url, "returns-http"), to_totals(expected))
        up_full = _upload(service.url, token, full["table"], dbname, service.pid)
        up_day = _upload(service.url, token, day["table"], dbname, service.pid)
        service_mib = peak_rss_mib(service.pid)
    finally:
        if service is not None:
            service.stop()
        drop_database(dbname)
    for m in (ing_p, ing_l, ing_d):
        m["peak_mib"] = ingest_mib
    c = info["counts"]["http"]
    n_base, n_day = c["labels-base"], c["labels-day"]
    measured = [
        ("HTTP", "full: POST predictions", c["predictions"], ing_p),
        ("HTTP", f"full: POST {n_base:,} labels", n_base, ing_l),
        ("HTTP", "full: refresh", c["predictions"] + n_base, ref_full),
        ("HTTP", "full (sum)", c["predictions"] + n_base, _sum(ing_p, ing_l, ref_full)),
        ("HTTP", f"day: POST {n_day:,} labels", n_day, ing_d),
        ("HTTP", "day: refresh", n_day, ref_day),
        ("HTTP", "day (sum)", n_day, _sum(ing_d, ref_day)),
    ]
    uploads = [
        [
            "upload (PUT /rollups)",
            f"{name}: {u['requests']} requests, {u['mib']:.1f} MiB",
            "",
            f"{rows:,}",
            f"{u['cpu']:.1f}",
            f"{u['wall']:.1f}",
            f"{rows / u['wall']:,.0f}",
            f"{service_mib:.0f}",
        ]
        for name, u, rows in (
            ("full", up_full, full["table"].num_rows),
            ("day", up_day, day["table"].num_rows),
        )
    ]
    notes = [
        f"HTTP path's stored hourly rollups equal DuckDB's on the same subset: {bad == 0}"
        f" ({bad} differ)",
        f"HTTP refresh marked {ref_full['marked']} + {ref_day['marked']} hours;"
        f" PostgreSQL backends' CPU-s in the HTTP rows: ingest"
        f" {ing_p['db_cpu'] + ing_l['db_cpu']:.1f}, refresh {ref_full['db_cpu']:.1f}",
    ]
    return {
        "rows": measured,
        "full": _sum(ing_p, ing_l, ref_full),
        "day": _sum(ing_d, ref_day),
        "uploads": uploads,
        "notes": notes,
    }
