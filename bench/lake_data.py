"""The logs of bench/lake.py: N predictions with labels, written once as Parquet and reused.

Seeded numpy PCG64: N orders of the furniture shop uniform over DAYS days up to NOW, scores
Beta(2, 5), tags region (four values) and channel (two); 80% labelled after an exponential
delay (mean 72 h), returned with the scored probability; 5% of those corrected 24 h later
(dropped when that is after NOW); 1% more labels for orders that never existed (orphans, one
hour before NOW). Files, each reused when present:
- predictions, labels (all of them, the full run's input);
- labels-base (arrived up to NOW - 24 h) and labels-day (the last day's arrivals: the
  incremental day);
- the same four for the HTTP subset (the first `subset` orders and a share of the orphans).
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

NOW = datetime(2026, 12, 1, tzinfo=UTC)
DAY_US = 86_400_000_000
FILES = ("predictions", "labels", "labels-base", "labels-day")


def ts_array(us: np.ndarray) -> pa.Array:
    """Microseconds since the epoch as a UTC timestamp column."""
    return pa.array(us.astype("datetime64[us]"), pa.timestamp("us")).cast(pa.timestamp("us", "UTC"))


def paths(where: Path, prefix: str = "") -> dict[str, str]:
    """The Parquet paths of one set of logs."""
    return {k: str(where / f"{prefix}{k}.parquet") for k in FILES}


def _write_split(preds: pa.Table, labels: pa.Table, out: dict[str, str]) -> None:
    """Write predictions and labels, and the labels split at NOW - 24 h."""
    pq.write_table(preds, out["predictions"])
    pq.write_table(labels, out["labels"])
    day_start = pa.scalar(NOW.timestamp() * 1e6 - DAY_US).cast(pa.int64())
    lab_us = pc.cast(pc.cast(labels.column("ts"), pa.timestamp("us")), pa.int64())
    late = pc.greater(lab_us, day_start)
    pq.write_table(labels.filter(pc.invert(late)), out["labels-base"])
    pq.write_table(labels.filter(late), out["labels-day"])


def make_logs(rows: int, days: int, subset: int, where: Path, seed: int = 17) -> dict[str, Any]:
    """Write the logs under `where` unless a run with the same sizes wrote them; their paths
    (full and HTTP subset) and counts."""
    meta = where / "meta.json"
    wanted = {"rows": rows, "days": days, "subset": subset, "seed": seed}
    if meta.exists() and json.loads(meta.read_text())["wanted"] == wanted:
        return dict(json.loads(meta.read_text()))
    where.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    end_us = int(NOW.timestamp() * 1e6)
    ts = end_us - rng.integers(0, days * DAY_US, rows)
    score = rng.beta(2, 5, rows)
    ids = np.char.add("o", np.arange(rows).astype(str))
    preds = pa.table(
        {
            "id": ids,
            "ts": ts_array(ts),
            "score": score,
            "region": rng.choice(["north", "south", "east", "west"], rows),
            "channel": rng.choice(["web", "store"], rows),
        }
    )
    labelled = np.flatnonzero(rng.random(rows) < 0.8)
    outcome = np.where(rng.random(labelled.size) < score[labelled], "returned", "kept")
    label_ts = ts[labelled] + rng.exponential(72 * 3.6e9, labelled.size).astype(np.int64)
    keep = label_ts <= end_us
    labelled, outcome, label_ts = labelled[keep], outcome[keep], label_ts[keep]
    # a correction strictly after its label and not after NOW: arrival order is time order
    fix = (rng.random(labelled.size) < 0.05) & (label_ts + DAY_US <= end_us)
    orphans = max(1, labelled.size // 100)
    who = np.concatenate([labelled, labelled[fix], np.full(orphans, -1)])
    lab_ids = np.concatenate(
        [ids[labelled], ids[labelled[fix]], np.char.add("ghost", np.arange(orphans).astype(str))]
    )
    lab_actual = np.concatenate(
        [outcome, np.where(outcome[fix] == "kept", "returned", "kept"), np.full(orphans, "kept")]
    )
    lab_ts = np.concatenate(
        [label_ts, label_ts[fix] + DAY_US, np.full(orphans, end_us - 3_600_000_000)]
    )
    labels = pa.table({"id": lab_ids, "actual": lab_actual, "ts": ts_array(lab_ts)})
    full, sub = paths(where), paths(where, "http-")
    _write_split(preds, labels, full)
    # the HTTP subset: the first `subset` orders (uniform in time) and as many orphans pro rata
    n_ghosts = max(1, orphans * subset // rows)
    in_sub = ((who >= 0) & (who < subset)) | ((who < 0) & (np.cumsum(who < 0) <= n_ghosts))
    _write_split(preds.slice(0, subset), labels.filter(pa.array(in_sub)), sub)
    info: dict[str, Any] = {"wanted": wanted, "full": full, "http": sub, "counts": {}}
    for name, ps in (("full", full), ("http", sub)):
        info["counts"][name] = {k: pq.read_metadata(p).num_rows for k, p in ps.items()}
    meta.write_text(json.dumps(info))
    return info
