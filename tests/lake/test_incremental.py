"""Late labels on a lake-fed model: recomputing only the hours a new label batch touched
(`belated lake run --touched-by`), or the days from `--since`, leaves exactly the rollups a
full run over all labels gives, hourly and daily."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from sqlalchemy import Engine, select
from typer.testing import CliRunner

from belated.cli import app
from belated.store.rollup_tables import Rollup
from belated.store.totals import Totals
from tests.conftest import LiveServer, Tenant
from tests.support import create_model
from tests.support.builders import epoch_hour
from tests.support.lake import CLASSES, NOW, ShopLogs, assert_same_rollups, shop_logs

SETTINGS: dict[str, Any] = {
    "classes": CLASSES,
    "positive": "returned",
    "threshold": 0.4,
    "negative_after_days": 10,
}


def stored(engine: Engine, model_id: int, level: str) -> dict[tuple[int, str, str], Totals]:
    with engine.connect() as conn:
        rows = conn.execute(
            select(Rollup.__table__).where(Rollup.model_id == model_id, Rollup.level == level)
        ).all()
    return {(r.start, r.seg_key, r.seg_value): Totals.from_row(r) for r in rows}


def lake_run(
    live: LiveServer,
    tenant: Tenant,
    model: str,
    preds: str,
    labels: str,
    *extra: str,
    now: datetime = NOW,
) -> str:
    result = CliRunner().invoke(
        app,
        [
            "lake",
            "run",
            "--model",
            model,
            "--predictions",
            preds,
            "--labels",
            labels,
            "--engine",
            "duckdb",
            "--now",
            now.isoformat(),
            *extra,
        ],
        env={"BELATED_URL": live.url, "BELATED_TOKEN": tenant.tokens["admin,ingest,read"]},
    )
    assert result.exit_code == 0, result.output
    return result.output


def second_batch(logs: ShopLogs, seed: int = 7) -> tuple[list[dict[str, Any]], set[int]]:
    """Late labels and corrections for orders of 2% of the hours (seeded)."""
    rng = np.random.default_rng(seed)
    hours = sorted({epoch_hour(p["ts"]) for p in logs.predictions})
    chosen = set(rng.choice(hours, max(1, round(0.02 * len(hours))), replace=False).tolist())
    final = {r["id"]: r["actual"] for r in logs.labels}  # the last to arrive wins
    batch = []
    for i, p in enumerate(p for p in logs.predictions if epoch_hour(p["ts"]) in chosen):
        value = CLASSES[1 - CLASSES.index(final[p["id"]])] if p["id"] in final else CLASSES[i % 2]
        when = NOW - timedelta(hours=2, minutes=i)
        batch.append({"id": p["id"], "actual": value, "ts": when, "received_at": when})
    return batch, chosen


def test_touched_hours_and_since_give_what_a_full_run_gives(
    tenant: Tenant, engine: Engine, live: LiveServer, frozen: None, tmp_path: Path
) -> None:
    logs = shop_logs()
    batch, chosen = second_batch(logs)
    assert 0 < len(chosen) and len(batch) >= len(chosen)
    preds, first_labels = logs.write(tmp_path / "day1")
    _, all_labels = logs.write(tmp_path / "day2", labels=[*logs.labels, *batch])
    new = tmp_path / "new-labels.parquet"
    pq.write_table(
        pa.table(
            {
                "id": [r["id"] for r in batch],
                "actual": [r["actual"] for r in batch],
                "ts": pa.array([r["ts"] for r in batch], pa.timestamp("us", "UTC")),
            }
        ),
        new,
    )
    touched = create_model(tenant, engine, source="lake", **SETTINGS)
    since = create_model(tenant, engine, source="lake", **SETTINGS)
    full = create_model(tenant, engine, source="lake", **SETTINGS)
    # the first runs a day before: since then late labels came, and the hours of a day
    # crossed negative_after_days (their unlabelled orders became implied negatives)
    day_before = NOW - timedelta(days=1)
    for model in (touched, since):
        lake_run(live, tenant, model.name, preds, first_labels, now=day_before)
    before = stored(engine, touched.id, "h")
    said = lake_run(
        live, tenant, touched.name, preds, all_labels, "--touched-by", str(new), "--every", "24"
    )
    assert "hours uploaded" in said, said
    crossed = set(
        range(
            epoch_hour(NOW - timedelta(days=SETTINGS["negative_after_days"] + 1)),
            epoch_hour(NOW - timedelta(days=SETTINGS["negative_after_days"])) + 1,
        )
    )
    first = min(min(chosen), min(crossed))
    since_day = datetime.fromtimestamp((first - first % 24) * 3600, UTC).strftime("%Y-%m-%d")
    lake_run(live, tenant, since.name, preds, all_labels, "--since", since_day)
    lake_run(live, tenant, full.name, preds, all_labels)
    said = lake_run(live, tenant, full.name, preds, all_labels, "--out", str(tmp_path / "out"))
    written = pq.read_table(tmp_path / "out" / f"{full.name}-rollups.parquet")
    assert written.num_rows == len(stored(engine, full.id, "h")), said
    for level in ("h", "d"):
        want = stored(engine, full.id, level)
        assert_same_rollups(stored(engine, touched.id, level), want)
        assert_same_rollups(stored(engine, since.id, level), want)
    after = stored(engine, touched.id, "h")
    changed = {k[0] for k in after if k not in before or after[k].to_row() != before[k].to_row()}
    # the new labels and the moved cutoff changed those hours, and only those
    assert changed & chosen and changed & crossed and changed <= chosen | crossed
