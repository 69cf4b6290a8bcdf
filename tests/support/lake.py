"""Predictions and labels of the furniture shop for the lake tests, as the team's logs
(Parquet) and as HTTP batches of the same content.

Scores: the cross-fitted logistic regression scores of the Wisconsin breast cancer data that
scikit-learn ships (Wolberg, Street and Mangasarian 1995; tests/support/datasets.py),
resampled with replacement (seeded numpy PCG64) to `n` orders, with a few scores set to bin
edges (0, 0.29, 0.5, 0.57, 1) where a careless bin rule would be one bin off. Times uniform
over 24 days at microsecond resolution; tags region (four values) and channel (web or app,
absent for a tenth). Labels: three quarters of the orders get an outcome after an
exponential delay (mean 72 h), arriving in the order of `received_at`; a tenth of those are
corrected later, some corrected back, some repeated unchanged; a few labels are for orders
that never existed (orphans), and some arrive before their prediction (pending over HTTP).
Orders older than `negative_after_days` without a label are implied negatives.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from sqlalchemy import Engine, select

from belated.lake import LakeModel
from belated.store import refresh
from belated.store.rollup_tables import Rollup
from belated.store.totals import Totals
from tests.support.builders import stamp
from tests.support.datasets import START, _breast_cancer_scores
from tests.support.models import Model, create_model
from tests.support.sending import send

NOW = START + timedelta(days=24, hours=7, minutes=30)
CLASSES = ["kept", "returned"]
LATE_SHARE = 0.05  # predictions posted after their labels (pending over HTTP)
# the binary model of the equality tests: implied negatives after 10 days
SETTINGS: dict[str, Any] = {
    "classes": CLASSES,
    "positive": "returned",
    "threshold": 0.4,
    "negative_after_days": 10,
}
LAKE_MODEL = LakeModel.of({"kind": "binary", **SETTINGS})


@dataclass(frozen=True)
class ShopLogs:
    """The predictions and labels logs, one dict per row."""

    predictions: list[dict[str, Any]]
    labels: list[dict[str, Any]]  # in arrival order (`received_at`)
    late: set[str]  # ids of the predictions posted after all labels

    def write(self, where: Path, labels: list[dict[str, Any]] | None = None) -> tuple[str, str]:
        """Both logs as Parquet files under `where`; their paths."""
        where.mkdir(parents=True, exist_ok=True)
        preds = pa.table(
            {
                "id": [p["id"] for p in self.predictions],
                "ts": pa.array([p["ts"] for p in self.predictions], pa.timestamp("us", "UTC")),
                "score": [p["score"] for p in self.predictions],
                "region": [p["region"] for p in self.predictions],
                "channel": [p["channel"] for p in self.predictions],
            }
        )
        rows = self.labels if labels is None else labels
        labs = pa.table(
            {
                "id": pa.array([r["id"] for r in rows], pa.string()),
                "actual": pa.array([r["actual"] for r in rows], pa.string()),
                "ts": pa.array([r["ts"] for r in rows], pa.timestamp("us", "UTC")),
                "received_at": pa.array(
                    [r["received_at"] for r in rows], pa.timestamp("us", "UTC")
                ),
            }
        )
        p, lab = where / "predictions.parquet", where / "labels.parquet"
        pq.write_table(preds, p)
        pq.write_table(labs, lab)
        return str(p), str(lab)

    def send(self, client: Any, model: str, labels: list[dict[str, Any]] | None = None) -> None:
        """Over HTTP: the predictions but the late ones, the labels in arrival order, then
        the late predictions (their labels wait as pending until then)."""

        def item(p: dict[str, Any]) -> dict[str, Any]:
            tags = {"region": p["region"]}
            if p["channel"] is not None:
                tags["channel"] = p["channel"]
            return {"id": p["id"], "ts": stamp(p["ts"]), "score": p["score"], "tags": tags}

        send(
            client,
            model,
            "predictions",
            [item(p) for p in self.predictions if p["id"] not in self.late],
        )
        rows = self.labels if labels is None else labels
        # in arrival order, a new request wherever an id comes again (a batch holds an id
        # once: a correction is a later request)
        batch: list[dict[str, Any]] = []
        for r in rows:
            if any(b["id"] == r["id"] for b in batch) or len(batch) == 2000:
                send(client, model, "labels", batch)
                batch = []
            batch.append({"id": r["id"], "actual": r["actual"], "ts": stamp(r["ts"])})
        if batch:
            send(client, model, "labels", batch)
        send(
            client,
            model,
            "predictions",
            [item(p) for p in self.predictions if p["id"] in self.late],
        )


def shop_logs(n: int = 3000, seed: int = 20261203, until: datetime = NOW) -> ShopLogs:
    """Seeded logs of `n` orders (see the module docstring); labels arrive by `until`."""
    base, _ = _breast_cancer_scores()
    rng = np.random.default_rng(seed)
    score = base[rng.integers(0, len(base), n)].astype(float)
    score[rng.choice(n, 25, replace=False)] = rng.choice([0.0, 0.29, 0.5, 0.57, 1.0], 25)
    t0 = START.timestamp()
    ts_us = np.floor((t0 + rng.uniform(0, 24 * 86400, n)) * 1e6).astype(np.int64)
    ts_us[:10] = (ts_us[:10] // 3_600_000_000) * 3_600_000_000  # on the hour exactly
    region = rng.choice(np.array(["north", "south", "east", "west"]), n, p=[0.4, 0.3, 0.2, 0.1])
    channel = rng.choice(np.array(["web", "app"]), n)
    no_channel = rng.random(n) < 0.1
    outcome = rng.random(n) < score  # returned with the scored probability (calibrated)
    preds, labels = [], []
    for i in range(n):
        pid = f"order-{i:05d}"
        ts = _at(int(ts_us[i]))
        preds.append(
            {
                "id": pid,
                "ts": ts,
                "score": float(score[i]),
                "region": str(region[i]),
                "channel": None if no_channel[i] else str(channel[i]),
            }
        )
        if rng.random() >= 0.75:
            continue
        first = ts + timedelta(microseconds=int(rng.exponential(72 * 3600e6)))
        value = CLASSES[int(outcome[i])]
        story = [(first, value)]
        roll = rng.random()
        if roll < 0.10:  # corrected
            story.append((first + timedelta(hours=float(rng.uniform(1, 200))), _other(value)))
            if roll < 0.03:  # and corrected back
                story.append((story[-1][0] + timedelta(hours=float(rng.uniform(1, 50))), value))
        elif roll < 0.14:  # repeated unchanged
            story.append((first + timedelta(hours=float(rng.uniform(1, 100))), value))
        for when, actual in story:
            received = when + timedelta(microseconds=int(rng.uniform(0, 7200e6)))
            if received <= until:
                labels.append({"id": pid, "actual": actual, "ts": when, "received_at": received})
    for j in range(40):  # orphans: orders that never reached the model
        when = until - timedelta(hours=float(rng.uniform(1, 400)))
        labels.append(
            {"id": f"ghost-{j}", "actual": CLASSES[j % 2], "ts": when, "received_at": when}
        )
    labels.sort(key=lambda r: r["received_at"])
    labelled = sorted({r["id"] for r in labels if r["id"].startswith("order-")})
    late = set(rng.choice(labelled, int(LATE_SHARE * len(labelled)), replace=False).tolist())
    return ShopLogs(preds, labels, late)


def _other(value: str) -> str:
    return CLASSES[1 - CLASSES.index(value)]


def _at(us: int) -> datetime:
    return datetime(1970, 1, 1, tzinfo=UTC) + timedelta(microseconds=us)


def assert_same_rollups(
    got: dict[tuple[int, str, str], Totals], want: dict[tuple[int, str, str], Totals]
) -> None:
    """Equal rollup rows: the same keys, counts exactly, float sums within 1e-9 relative
    (the summation order differs: DESIGN.md)."""
    assert sorted(got) == sorted(want)
    for key in want:
        g, w = got[key], want[key]
        assert g.scalar_counts.tolist() == w.scalar_counts.tolist(), key
        for a, b in zip(g.scalar_sums.tolist(), w.scalar_sums.tolist(), strict=True):
            assert math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12), (key, a, b)
        names = set(g.hist_counts) | set(w.hist_counts)
        for name in names:
            assert g.counts(name).tolist() == w.counts(name).tolist(), (key, name)
            if name in g.hist_sums or name in w.hist_sums:
                np.testing.assert_allclose(g.sums(name), w.sums(name), rtol=1e-9, atol=1e-12)
        assert (g.cells or {}) == (w.cells or {}), key


def stored(engine: Engine, model_id: int, level: str = "h") -> dict[tuple[int, str, str], Totals]:
    """The stored rollup rows of a model, hourly ('h') or daily ('d')."""
    with engine.connect() as conn:
        rows = conn.execute(
            select(Rollup.__table__).where(Rollup.model_id == model_id, Rollup.level == level)
        ).all()
    return {(r.start, r.seg_key, r.seg_value): Totals.from_row(r) for r in rows}


def http_twin(tenant: Any, engine: Engine, sessions: Any, logs: ShopLogs) -> Model:
    """An HTTP-fed model of SETTINGS that received the logs over HTTP, refreshed (at the
    frozen clock)."""
    model = create_model(tenant, engine, **SETTINGS)
    logs.send(tenant.client, model.name)
    refresh.join_and_mark(sessions)
    refresh.refresh_all(sessions, max_values=100)
    return model
