"""Erasure by id, on both stores: windows after erasure equal scikit-learn's recount over the
remaining rows, the rollups equal a rebuild from them, and nothing of an erased id is left in
any table, read with the database's own client (the sqlite3 module, psycopg without
SQLAlchemy).

Reference: scikit-learn's metrics on the rows of each daily window (tests/support/datasets.py,
the Wisconsin breast cancer data scored by cross-fitting); the rollups a rebuild writes from
raw rows (counts exactly, float sums within 1e-9 relative).
"""

from __future__ import annotations

import dataclasses
import json
import sqlite3
from collections.abc import Iterator
from datetime import timedelta
from typing import Any

import numpy as np
import psycopg
import pytest
from sqlalchemy import Engine

from belated.clock import clock
from belated.store import refresh, rollups
from tests.conftest import Tenant
from tests.support import (
    base_time,
    count,
    create_model,
    label,
    predictions,
    send,
    stamp,
    stored_rollups,
    three_class_scores,
    unique_name,
)
from tests.support.datasets import (
    NOW,
    START,
    STEPS,
    Scenario,
    assert_close,
    at,
    breast_cancer,
    check_window,
    effective,
    in_range,
    metrics,
    window_starts,
)

SETTINGS = {"label_delay_days": 14, "min_coverage": 0.8, "segment_keys": ["region", "channel"]}
RANGE = (START, START + timedelta(days=25))


@pytest.fixture()
def frozen() -> Iterator[None]:
    """The process clock frozen at NOW (the scenario's present), let go after the test."""
    clock.set(NOW)
    yield
    clock.set(None)


@pytest.fixture()
def spy(monkeypatch: pytest.MonkeyPatch) -> list[tuple[bool, int]]:
    """(a difference?, erased rows?) of every aggregation the store runs (the real one
    runs)."""
    calls: list[tuple[bool, bool]] = []
    real = rollups.compute

    def recording(session: Any, scope: Any, keys: Any) -> Any:
        calls.append((scope.of_changes, bool(scope.erased)))
        return real(session, scope, keys)

    monkeypatch.setattr(rollups, "compute", recording)
    return calls


def erase(tenant: Tenant, model: str, ids: list[str]) -> dict[str, Any]:
    """DELETE the ids; must be a 200."""
    r = tenant.client.request(
        "DELETE",
        f"/v1/models/{model}/predictions",
        json={"ids": ids},
        headers=tenant.headers("admin"),
    )
    assert r.status_code == 200, r.text
    return dict(r.json())


def _check_days(tenant: Tenant, model: str, sc: Scenario, kept: np.ndarray, *state: Any) -> None:
    answer = metrics(tenant.client, model, start=stamp(RANGE[0]), end=stamp(RANGE[1]))
    for w, s in zip(answer["windows"], window_starts("day", *RANGE), strict=True):
        check_window(w, sc, kept & in_range(sc.ts, s, s + STEPS["day"]), *state)


def _without_cut(found: dict[Any, Any]) -> dict[Any, Any]:
    # the cutoff an hour was aggregated with depends on when; everything else must agree
    # (SQLite hands JSON to plain SQL as text, whose key order is the writer's)
    return {
        k: {
            c: json.loads(v) if c == "cells" and isinstance(v, str) else v
            for c, v in r.items()
            if c != "negative_cutoff"
        }
        for k, r in found.items()
    }


def every_cell(engine: Engine) -> list[tuple[str, str, Any]]:
    """(table, column, value) of every cell of every table, read with the database's own
    client rather than through the service's code."""
    url = engine.url
    out: list[tuple[str, str, Any]] = []
    if url.get_backend_name() == "sqlite":
        assert url.database
        with sqlite3.connect(url.database) as conn:
            tables = [
                t for (t,) in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")
            ]
            for table in tables:
                cur = conn.execute(f'SELECT * FROM "{table}"')
                cols = [d[0] for d in cur.description]
                out += [(table, c, v) for row in cur for c, v in zip(cols, row, strict=True)]
        return out
    conninfo = f"host={url.host} port={url.port or 5432} user={url.username} dbname={url.database}"
    with psycopg.connect(conninfo) as conn:
        tables = [
            t
            for (t,) in conn.execute(
                "SELECT table_name FROM information_schema.tables"
                " WHERE table_schema = 'public' AND table_type = 'BASE TABLE'"
            )
        ]
        for table in tables:
            cur = conn.execute(f'SELECT * FROM "{table}"')
            assert cur.description is not None
            cols = [d.name for d in cur.description]
            out += [(table, c, v) for row in cur for c, v in zip(cols, row, strict=True)]
    return out


def leftovers(engine: Engine, ids: list[str], row_ids: set[int]) -> list[tuple[str, str, Any]]:
    """Cells that still name an erased id (as a value or inside JSON or text), or that point
    at an erased prediction row."""
    found = []
    for table, col, value in every_cell(engine):
        if value is None:
            continue
        text = value.decode("latin-1") if isinstance(value, bytes | memoryview) else str(value)
        if any(pid in text for pid in ids):
            found.append((table, col, value))
        if table in ("predictions", "label_changes") and col == "row_id" and value in row_ids:
            found.append((table, col, value))
    return found


def test_erasure_takes_rows_out_by_difference_and_leaves_nothing(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None, spy: list[tuple[bool, bool]]
) -> None:
    sc = breast_cancer(prefix=unique_name())
    model = create_model(tenant, engine, negative_after_days=10, **SETTINGS)
    send(tenant.client, model.name, "predictions", sc.prediction_items())
    known = sc.known(NOW)
    send(tenant.client, model.name, "labels", sc.label_items(known))
    assert refresh.refresh_all(sessions, max_values=100, model_id=model.id) > 0
    # corrections logged but not folded yet: the erasure must fold them first
    rng = np.random.default_rng(11)
    flipped = rng.choice(np.flatnonzero(known), 30, replace=False)
    corrected = sc.actual.copy()
    corrected[flipped] = 1 - corrected[flipped]
    fixes = [
        {
            "id": sc.pids[i],
            "actual": str(int(corrected[i])),
            "ts": stamp(at(sc.label_at[i]) + timedelta(hours=1)),
        }
        for i in flipped
    ]
    assert send(tenant.client, model.name, "labels", fixes)["corrected"] == len(flipped)
    assert count(engine, "label_changes", model.id) == len(flipped)
    # labels waiting for predictions never sent: erased as pending labels
    waiting = [f"{sc.pids[0]}-later-{k}" for k in range(3)]
    send(tenant.client, model.name, "labels", [{"id": w, "actual": "1"} for w in waiting])
    stored_ids = {
        v for t, c, v in every_cell(engine) if t == "predictions" and c == "pid" and v in sc.pids
    }
    assert len(stored_ids) == len(sc.pids)

    # erased: labelled, unlabelled (implied negatives among them), corrected, whole hours
    erased = np.zeros(len(sc.pids), bool)
    erased[rng.choice(len(sc.pids), 90, replace=False)] = True
    erased[flipped[:10]] = True
    day3 = in_range(sc.ts, START + timedelta(days=3), START + timedelta(days=4))
    erased |= day3  # a whole day: its hourly and daily rows must go
    assert (erased & ~known).any() and (erased & known).any()
    ids = [sc.pids[i] for i in np.flatnonzero(erased)]
    with engine.connect() as conn:
        row_ids = {
            int(r)
            for (r,) in conn.exec_driver_sql(
                f"SELECT row_id FROM predictions WHERE model_id = {model.id}"
                f" AND pid IN ({','.join(repr(i) for i in ids)})"
            )
        }
    unknown = ["never-sent-1", "never-sent-2"]
    spy.clear()
    answer = erase(tenant, model.name, [*ids, *waiting, *unknown, ids[0]])
    assert answer["erased"]["predictions"] == len(ids)
    assert answer["erased"]["pending_labels"] == len(waiting)
    history = (erased & known).sum() + erased[flipped].sum() + len(waiting)  # corrections too
    assert answer["erased"]["labels"] == int(history)
    assert answer["not_found"] == unknown
    # the corrections folded, then the erased rows taken out: by difference, no hour
    # aggregated again from raw rows
    assert spy == [(True, False), (True, True)]

    assert leftovers(engine, [*ids, *waiting], row_ids) == []
    assert count(engine, "predictions", model.id) == len(sc.pids) - len(ids)
    assert count(engine, "pending_labels", model.id) == 0

    kept = ~erased
    _check_days(
        tenant,
        model.name,
        sc,
        kept,
        *effective(sc, NOW, actual=corrected, known=known, negative_after_days=10),
    )
    taken_out = stored_rollups(engine, model.id)
    assert not [
        k
        for k in taken_out
        if k[0] == "d" and k[1] == int((START + timedelta(days=3)).timestamp() // 3600)
    ]
    refresh.rebuild(sessions, max_values=100, model_id=model.id)
    assert_close(_without_cut(stored_rollups(engine, model.id)), _without_cut(taken_out))


def test_an_erased_id_sent_again_is_stored_as_new(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None
) -> None:
    sc = breast_cancer(prefix=unique_name())
    model = create_model(tenant, engine, **SETTINGS)
    send(tenant.client, model.name, "predictions", sc.prediction_items())
    known = sc.known(NOW)
    send(tenant.client, model.name, "labels", sc.label_items(known))
    idx = np.flatnonzero(known)[:20]
    ids = [sc.pids[i] for i in idx]
    assert erase(tenant, model.name, ids)["erased"]["predictions"] == len(ids)

    # sent again with other content (another time and score): new rows, not a conflict
    again = breast_cancer(prefix="x")
    moved = sc.prediction_items(idx)
    for item, i in zip(moved, idx, strict=True):
        item["score"] = float(again.score[(i + 7) % len(again.pids)])
        item["ts"] = stamp(at(sc.ts[i]) + timedelta(days=1))
    answer = send(tenant.client, model.name, "predictions", moved)
    assert answer == {"accepted": len(ids), "duplicates": 0}
    labelled = send(
        tenant.client, model.name, "labels", sc.label_items(np.isin(np.arange(len(sc.pids)), idx))
    )
    assert labelled["matched"] == len(ids) and labelled["pending"] == 0

    score, ts = sc.score.copy(), sc.ts.copy()
    score[idx] = [m["score"] for m in moved]
    ts[idx] += 86400
    new = dataclasses.replace(sc, ts=ts, score=score)
    everything = np.ones(len(sc.pids), bool)
    _check_days(tenant, model.name, new, everything, *effective(new, NOW, known=known))


def test_a_multiclass_erasure_equals_a_rebuild_without_the_rows(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    classes = ("oak", "pine", "walnut")
    model = create_model(
        tenant, engine, kind="multiclass", classes=list(classes), segment_keys=["region"]
    )
    rng = np.random.default_rng(3)
    items = predictions(300, base=base_time() - timedelta(days=3))
    for n, it in enumerate(items):
        it.pop("score")
        it["scores"] = three_class_scores(classes[n % 3], float(rng.uniform(0.4, 0.9)), classes)
        it["tags"] = {"region": ("north", "south", "east")[int(rng.integers(3))]}
    send(tenant.client, model.name, "predictions", items)
    send(
        tenant.client,
        model.name,
        "labels",
        [label(it["id"], classes[int(rng.integers(3))]) for it in items[::2]],
    )
    refresh.refresh_all(sessions, max_values=100, model_id=model.id)
    gone = [it["id"] for it in items[::7]]
    assert erase(tenant, model.name, gone)["erased"]["predictions"] == len(gone)
    taken_out = stored_rollups(engine, model.id)
    refresh.rebuild(sessions, max_values=100, model_id=model.id)
    assert_close(_without_cut(stored_rollups(engine, model.id)), _without_cut(taken_out))
    assert sum(
        r["n_pred"] for k, r in taken_out.items() if k[0] == "d" and k[2] == ""
    ) == 300 - len(gone)
