"""Data and subprocess helpers for bench/windows.py.

The scenario: an online furniture shop predicting whether an order will be returned. A
year of orders (2025-01-01 to 2026-01-01 UTC), seeded numpy PCG64:
- `ts` uniform over the year, sorted (predictions arrive in time order, as a live system
  appends them); `pid` numbers the orders in that order;
- tag `channel` web/app/phone with probabilities 0.55/0.35/0.10, tag `region`
  north/south/east/west uniform;
- returned (actual "1") ~ Bernoulli(0.12 web, 0.18 app, 0.25 phone);
- score = sigmoid(z), z ~ Normal(+1.2, 1) for returned orders and Normal(-1.3, 1) for kept
  ones; predicted "1" when score >= 0.5 (the model's threshold);
- label delay ~ Exponential(mean 240 h); label_ts = ts + delay;
- 99% of rows are loaded labelled; 1% (chosen uniformly, so spread over the year) are
  loaded without a label and receive it later through the label ingest path.

Run as `python -m bench.windows_data rebuild|refresh URL MODEL_ID [--explain]` it is the
measured child process: it times refresh.rebuild or refresh.refresh_all and the time spent
inside each kind of SQL statement, and prints one JSON line.
"""

from __future__ import annotations

import io
import json
import re
import sys
import time
from collections import defaultdict
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

import numpy as np
import pandas as pd
import psycopg

MODEL = "returns-bench"
CHANNELS = ("web", "app", "phone")
CHANNEL_P = (0.55, 0.35, 0.10)
RETURN_P = (0.12, 0.18, 0.25)
REGIONS = ("north", "south", "east", "west")
YEAR_START = datetime(2025, 1, 1, tzinfo=UTC)
YEAR_SECONDS = 365 * 86400
UNLABELLED_SHARE = 0.01
COLS = (
    "model_id",
    "pid",
    "ts",
    "hour",
    "score",
    "predicted",
    "tags",
    "actual",
    "label_ts",
    "delay_h",
    "received_at",
)
CHUNK = 50_000  # rows per COPY write; the late rows of a chunk follow its labelled ones


@dataclass
class Data:
    """The generated rows as arrays (row i is order `pid(i)`)."""

    ts: np.ndarray  # seconds since the epoch, float64, sorted
    channel: np.ndarray  # int8 index into CHANNELS
    region: np.ndarray  # int8 index into REGIONS
    actual: np.ndarray  # int8 0/1 (the truth, also for rows loaded unlabelled)
    score: np.ndarray  # float64
    delay_h: np.ndarray  # float64
    late: np.ndarray  # int64 indexes of the rows loaded without a label

    @property
    def n(self) -> int:
        """Number of rows."""
        return len(self.ts)


def pid(i: int) -> str:
    """The order id of row i."""
    return f"o{i:09d}"


def generate(n: int, seed: int = 20250101) -> Data:
    """Seeded rows following the distribution in the module docstring."""
    rng = np.random.default_rng(seed)
    ts = np.sort(YEAR_START.timestamp() + rng.random(n) * YEAR_SECONDS)
    channel = rng.choice(3, size=n, p=CHANNEL_P).astype(np.int8)
    region = rng.integers(0, 4, size=n).astype(np.int8)
    actual = (rng.random(n) < np.asarray(RETURN_P)[channel]).astype(np.int8)
    z = np.where(actual == 1, 1.2, -1.3) + rng.standard_normal(n)
    score = 1.0 / (1.0 + np.exp(-z))
    delay_h = rng.exponential(240.0, size=n)
    late = np.sort(rng.choice(n, size=int(n * UNLABELLED_SHARE), replace=False))
    return Data(ts, channel, region, actual, score, delay_h, late)


PG_EPOCH = 946684800  # 2000-01-01T00:00:00Z, the origin of PostgreSQL's binary timestamps
_TAG_TEXT = [json.dumps({"channel": c, "region": r}) for c in CHANNELS for r in REGIONS]
_TAG_LEN = 1 + max(len(t) for t in _TAG_TEXT)
# jsonb's binary input is a version byte and JSON text; padding spaces keep every record the
# same width, so a whole chunk is one numpy structured array.
_TAGS = np.array(
    [b"\x01" + t.ljust(_TAG_LEN - 1).encode() for t in _TAG_TEXT], dtype=f"S{_TAG_LEN}"
)


def _record(labelled: bool) -> np.dtype:
    """One binary COPY tuple of COLS; a NULL field is a length of -1 with no data."""

    def field(name: str, fmt: str) -> list[tuple[str, str]]:
        return [(f"{name}_len", ">i4"), (name, fmt)]

    late = [("actual_len", ">i4"), ("label_ts_len", ">i4"), ("delay_h_len", ">i4")]
    label = field("actual", "S1") + field("label_ts", ">i8") + field("delay_h", ">f8")
    return np.dtype(
        [
            ("nfields", ">i2"),
            *field("model_id", ">i4"),
            *field("pid", "S10"),
            *field("ts", ">i8"),
            *field("hour", ">i4"),
            *field("score", ">f8"),
            *field("predicted", "S1"),
            *field("tags", f"S{_TAG_LEN}"),
            *(label if labelled else late),
            *field("received_at", ">i8"),
        ]
    )


def _pids(lo: int, hi: int) -> np.ndarray:
    digits = np.empty((hi - lo, 10), dtype=np.uint8)
    digits[:, 0] = ord("o")
    idx = np.arange(lo, hi, dtype=np.int64)
    for k in range(9):
        digits[:, 9 - k] = 48 + (idx // 10**k) % 10
    return digits.view("S10").ravel()


def _chunk(d: Data, model_id: int, lo: int, hi: int, labelled: np.ndarray) -> bytes:
    """Binary COPY tuples of rows [lo, hi): the labelled ones, then the others."""
    out = []
    for flag in (True, False):
        rows = np.flatnonzero(labelled[lo:hi] == flag) + lo
        rec = np.zeros(len(rows), dtype=_record(flag))
        rec["nfields"] = len(COLS)
        us = np.round((d.ts[rows] - PG_EPOCH) * 1e6).astype(np.int64)
        values: dict[str, Any] = {
            "model_id": model_id,
            "pid": _pids(lo, hi)[rows - lo],
            "ts": us,
            "hour": (us // 1_000_000 + PG_EPOCH) // 3600,
            "score": d.score[rows],
            "predicted": np.where(d.score[rows] >= 0.5, b"1", b"0"),
            "tags": _TAGS[d.channel[rows].astype(np.int64) * 4 + d.region[rows]],
            "received_at": us,
        }
        if flag:
            values["actual"] = np.where(d.actual[rows] == 1, b"1", b"0")
            values["label_ts"] = us + np.round(d.delay_h[rows] * 3.6e9).astype(np.int64)
            values["delay_h"] = d.delay_h[rows]
        for name in COLS:
            if name in values:
                rec[f"{name}_len"] = rec.dtype[name].itemsize
                rec[name] = values[name]
            else:
                rec[f"{name}_len"] = -1
        out.append(rec.tobytes())
    return b"".join(out)


def load(url: str, model_id: int, d: Data) -> None:
    """Binary COPY of the rows into `predictions` (its day partitions made first, the id
    registry filled after), building its secondary indexes after the load."""
    from belated.store import partitions

    labelled = np.ones(d.n, dtype=bool)
    labelled[d.late] = False
    hours = np.unique((d.ts // 3600).astype(np.int64))
    with psycopg.connect(url, autocommit=True) as conn:
        with conn.transaction():
            conn.execute("SELECT pg_advisory_xact_lock(%s)", (partitions._LOCK,))
            have = {
                r[0]
                for r in conn.execute(
                    "SELECT c.relname FROM pg_inherits i JOIN pg_class c ON c.oid = i.inhrelid"
                    " WHERE i.inhparent = 'predictions'::regclass"
                )
            }
            for day in sorted({int(h) // 24 for h in hours}):
                name = partitions.day_name(day)
                if name not in have:
                    conn.execute(
                        f"CREATE TABLE {name} PARTITION OF predictions"
                        f" FOR VALUES FROM ({day * 24}) TO ({day * 24 + 24})"
                    )
        # Index builds after the load are much faster than index upkeep during it.
        idx = conn.execute(
            "SELECT indexname, indexdef FROM pg_indexes WHERE tablename = 'predictions'"
            " AND indexname NOT LIKE 'pk_%'"
        ).fetchall()
        for name, _ in idx:
            conn.execute(f'DROP INDEX "{name}"')
        with conn.transaction():
            conn.execute("SET LOCAL session_replication_role = replica")  # skip the FK trigger
            with conn.cursor().copy(
                f"COPY predictions ({', '.join(COLS)}) FROM STDIN (FORMAT binary)"
            ) as copy:
                copy.write(b"PGCOPY\n\xff\r\n\x00" + bytes(8))  # signature, flags, extension
                for lo in range(0, d.n, CHUNK):
                    copy.write(_chunk(d, model_id, lo, min(lo + CHUNK, d.n), labelled))
                copy.write(b"\xff\xff")  # trailer
        conn.execute("SET maintenance_work_mem = '1GB'")
        conn.execute(
            "INSERT INTO prediction_ids (model_id, pid, hour)"
            " SELECT model_id, pid, hour FROM predictions WHERE model_id = %s",
            (model_id,),
        )
        for _, definition in idx:
            # a partitioned parent's index reads "ON ONLY predictions", which builds no index
            # on the partitions: without ONLY, each partition gets its own
            conn.execute(definition.replace(" ON ONLY ", " ON "))
        conn.execute("VACUUM (ANALYZE) predictions")  # hint bits and statistics, as in steady state
        conn.execute("VACUUM (ANALYZE) prediction_ids")


def setup_tenant(sa_url: str) -> tuple[int, str]:
    """Migrate, then create the project, the model and a read token with the store's functions."""
    from belated.store import keys, model_registry
    from belated.store.db import make_engine, make_sessionmaker, transaction
    from belated.store.migrate import upgrade

    upgrade(sa_url)
    engine = make_engine(sa_url)
    with transaction(make_sessionmaker(engine)) as session:
        project = keys.get_or_create_project(session=session, name="furniture-shop")
        model = model_registry.create(
            session=session,
            project_id=project.id,
            fields={
                "name": MODEL,
                "kind": "binary",
                "classes": ["0", "1"],
                "positive": "1",
                "segment_keys": ["channel", "region"],
            },
        )
        _, token = keys.create(session=session, project_id=project.id, scopes=["read"])
        model_id = model.id
    engine.dispose()
    return model_id, token


def ingest_labels(
    sa_url: str, model_id: int, d: Data, batch: int = 10_000, seed: int = 7
) -> tuple[float, dict[str, int]]:
    """Send the late labels through belated.store.labels.ingest, in shuffled batches."""
    from belated.ingest.validate import LabelIn
    from belated.store import labels
    from belated.store.db import make_engine, make_sessionmaker, transaction

    order = np.random.default_rng(seed).permutation(d.late)
    items = [
        LabelIn(
            pid(int(i)),
            "1" if d.actual[i] else "0",
            datetime.fromtimestamp(float(d.ts[i] + d.delay_h[i] * 3600), UTC),
        )
        for i in order
    ]
    factory = make_sessionmaker(make_engine(sa_url))
    totals: dict[str, int] = defaultdict(int)
    t0 = time.perf_counter()
    for lo in range(0, len(items), batch):
        with transaction(factory) as session:
            answer = labels.ingest(session=session, model_id=model_id, items=items[lo : lo + batch])
        for k, v in answer.items():
            totals[k] += v
    return time.perf_counter() - t0, dict(totals)


_KINDS = (
    ("UNION ALL SELECT row_id", "label changes GROUP BY"),
    ("DELETE FROM label_changes", "label changes: delete"),
    ("jsonb_object_keys", "segments: seen keys"),
    ("SELECT DISTINCT", "segments: seen values"),
    ("delay_h < 48", "delays GROUP BY"),
    ("SUM(score)\n", "histograms GROUP BY"),
    ("COUNT(*), COUNT(", "scalars GROUP BY"),
    ("DELETE FROM rollups", "rollups: delete"),
    ("INSERT INTO rollups", "rollups: insert"),
    ("FROM rollups", "rollups: read stored rows"),
    ("dirty_buckets", "dirty marks"),
)


def kind_of(statement: str) -> str:
    """A short name for the kind of a product SQL statement."""
    for needle, name in _KINDS:
        if needle in statement:
            if name.endswith("GROUP BY"):
                name += " per tag key" if "tags ->>" in statement else " overall"
            return name
    return "other"


def _child(mode: str, url: str, model_id: int, explain: bool) -> dict[str, Any]:
    from sqlalchemy import event

    from belated.store import refresh
    from belated.store.db import make_engine, make_sessionmaker

    engine = make_engine(url)
    spent: dict[str, list[float]] = defaultdict(lambda: [0.0, 0])
    plans: dict[str, str] = {}

    @event.listens_for(engine, "before_cursor_execute")
    def _before(conn: Any, *_: Any) -> None:
        conn.info.setdefault("t0", []).append(time.perf_counter())

    @event.listens_for(engine, "after_cursor_execute")
    def _after(conn: Any, _cursor: Any, statement: str, params: Any, *_: Any) -> None:
        kind = kind_of(statement)
        cell = spent[kind]
        cell[0] += time.perf_counter() - conn.info["t0"].pop()
        cell[1] += 1
        if (
            explain
            and kind not in plans
            and kind.endswith(("BY overall", "tag key", "values", "keys", "hourly rows"))
        ):
            plans[kind] = _explain(url, statement, params)

    factory = make_sessionmaker(engine)
    t0 = time.perf_counter()
    if mode == "rebuild":
        buckets = refresh.rebuild(factory, max_values=100, model_id=model_id)
    else:
        buckets = refresh.refresh_all(factory, max_values=100)
    seconds = time.perf_counter() - t0
    return {
        "seconds": seconds,
        "buckets": buckets,
        "sql": {k: {"seconds": v[0], "calls": v[1]} for k, v in spent.items()},
        "plans": plans,
    }


def _explain(sa_url: str, statement: str, params: Any) -> str:
    """EXPLAIN ANALYZE of one statement, run apart (its time is not in the breakdown)."""
    t0 = time.perf_counter()
    with psycopg.connect(sa_url.replace("postgresql+psycopg://", "postgresql://")) as conn:
        rows = conn.execute("EXPLAIN (ANALYZE, BUFFERS) " + statement, params).fetchall()
    plan = "\n".join(r[0] for r in rows)
    return re.sub(
        r"\n{2,}",
        "\n",
        f"-- {statement.strip()[:400]}\n{plan}\n-- (explain took {time.perf_counter() - t0:.2f} s)",
    )


_SCALARS = """count(*), count(actual), 0, count(*) FILTER (WHERE predicted = '1'),
  count(*) FILTER (WHERE predicted = '1' AND actual = '1'),
  count(*) FILTER (WHERE predicted = '1' AND actual = '0'),
  count(*) FILTER (WHERE predicted = '0' AND actual = '1'),
  count(*) FILTER (WHERE predicted = '0' AND actual = '0'),
  sum(CASE WHEN actual = '1' THEN (1 - score) ^ 2 WHEN actual = '0' THEN score ^ 2 ELSE 0 END),
  sum(CASE WHEN actual = '1' THEN -ln(greatest(least(score, 1 - 2.2e-16), 2.2e-16))
           WHEN actual = '0' THEN -ln(1 - greatest(least(score, 1 - 2.2e-16), 2.2e-16))
           ELSE 0 END),
  sum(score) FILTER (WHERE predicted = '1'), sum(1 - score) FILTER (WHERE predicted = '1'),
  sum(score) FILTER (WHERE predicted = '0'), sum(1 - score) FILTER (WHERE predicted = '0')"""
_ROWS = """FROM (SELECT hour, tags ->> 'channel' AS ch, tags ->> 'region' AS rg, predicted, actual,
  score, delay_h FROM predictions WHERE model_id = %(m)s AND hour >= %(lo)s AND hour < %(hi)s) p"""
_SETS = "GROUPING SETS ((hour{x}), (hour, ch{x}), (hour, rg{x}))"
SAME_CONTENT_SQL = (
    f"SELECT hour, ch, rg, {_SCALARS} {_ROWS} GROUP BY {_SETS.format(x='')}",
    f"""SELECT hour, ch, rg, c, b, count(*), sum(score) FROM (SELECT *,
      CASE WHEN actual = '1' THEN 0 WHEN actual IS NOT NULL THEN 1 ELSE 2 END AS c,
      least(floor(score * 100)::int, 99) AS b {_ROWS}) q GROUP BY {_SETS.format(x=", c, b")}""",
    f"""SELECT hour, CASE WHEN delay_h < 48 THEN floor(delay_h)::int
      WHEN delay_h < 168 THEN 48 + floor((delay_h - 48) / 6)::int
      ELSE least(68 + floor((delay_h - 168) / 24)::int, 461) END AS b, count(*)
      {_ROWS} WHERE actual IS NOT NULL GROUP BY 1, 2""",
)


def same_content(url: str, model_id: int, week: int = 168) -> float:
    """Seconds of a hand-written aggregation of everything the rollups hold (all segments,
    histograms, delays), week by week: one GROUPING SETS scan for the scalars, one for the
    histograms, one for the delays; rows fetched, not accumulated or written."""
    with psycopg.connect(url) as conn:
        lo, hi = conn.execute(
            "SELECT min(hour), max(hour) + 1 FROM predictions WHERE model_id = %s", (model_id,)
        ).fetchone()
        conn.execute("SET work_mem = '64MB'")  # lets the planner hash the grouping sets
        t0 = time.perf_counter()
        for start in range(lo, hi, week):
            params = {"m": model_id, "lo": start, "hi": start + week}
            for sql in SAME_CONTENT_SQL:
                conn.execute(sql, params).fetchall()
        return time.perf_counter() - t0


def copy_rows(url: str, model_id: int) -> pd.DataFrame:
    """The raw rows a recompute needs (hour, predicted, actual), read with psycopg COPY."""
    buf = io.BytesIO()
    with (
        psycopg.connect(url) as conn,
        conn.cursor().copy(
            "COPY (SELECT hour, predicted, actual FROM predictions WHERE model_id = %s)"
            " TO STDOUT (FORMAT csv)",
            (model_id,),
        ) as copy,
    ):
        for block in copy:
            buf.write(block)
    buf.seek(0)
    return pd.read_csv(
        buf,
        names=["hour", "predicted", "actual"],
        dtype={"hour": "int64", "predicted": "int8", "actual": "float32"},
    )


if __name__ == "__main__":
    _mode, _url, _mid = sys.argv[1], sys.argv[2], int(sys.argv[3])
    _result = _child(_mode, _url, _mid, explain="--explain" in sys.argv)
    if _mode == "rebuild" and "--explain" in sys.argv:
        _result["seconds_note"] = "includes EXPLAIN ANALYZE runs"
    print(json.dumps(_result))
