"""End to end: the breast cancer data through the API; every window against scikit-learn.

The reference is scikit-learn's metrics (confusion_matrix, precision_score, recall_score,
fbeta_score, ...) on the labelled rows of each window (see tests/support/datasets.py). Runs on
SQLite and PostgreSQL (the store fixtures are parametrised).
"""

from __future__ import annotations

import os
import subprocess
from datetime import timedelta
from typing import Any

import numpy as np
import pytest
from sqlalchemy import Engine, text

from belated.clock import clock
from belated.store import refresh
from tests.conftest import REPO, Tenant
from tests.support import create_model, send, stamp, stored_rollups
from tests.support.datasets import (
    NOW,
    OUTAGE_DAY,
    START,
    STEPS,
    align,
    assert_close,
    breast_cancer,
    check_window,
    effective,
    in_range,
    ingest,
    metrics,
    settled,
    window_starts,
)

SETTINGS = {"label_delay_days": 14, "min_coverage": 0.8}


def check_range(
    answer: dict[str, Any],
    granularity: str,
    start: Any,
    end: Any,
    sc: Any,
    labelled: np.ndarray,
    y: np.ndarray,
    implied: np.ndarray,
    beta: float = 1.0,
    full: bool = True,
) -> None:
    """Windows contiguous over [start, end) and each equal to the reference."""
    starts = window_starts(granularity, start, end)
    windows = answer["windows"]
    assert [w["start"] for w in windows] == [stamp(s) for s in starts]
    assert [w["end"] for w in windows] == [stamp(s + STEPS[granularity]) for s in starts]
    for w, s in zip(windows, starts, strict=True):
        check_window(
            w, sc, in_range(sc.ts, s, s + STEPS[granularity]), labelled, y, implied, beta, full
        )


def test_daily_windows_equal_sklearn_with_both_spellings_of_beta(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    ingest(tenant.client, model.name, sc, NOW)
    labelled, y, implied = effective(sc, NOW)
    start, end = START - timedelta(days=2), align(NOW, "day") + timedelta(days=1)
    for params, beta in (
        ({}, 1.0),
        ({"beta": 2}, 2.0),
        ({"precision_weight": 0.2}, 2.0),
        ({"beta": 0.5}, 0.5),
    ):
        answer = metrics(
            tenant.client,
            model.name,
            granularity="day",
            start=stamp(start),
            end=stamp(end),
            **params,
        )
        assert answer["beta"] == pytest.approx(beta, rel=1e-12)
        check_range(
            answer, "day", start, end, sc, labelled, y, implied, beta, full=not params
        )  # the other measures do not depend on beta
    windows = answer["windows"]
    # contiguous windows include empty ones: two days before the data, the outage, the tail
    empty = [w for w in windows if w["predictions"] == 0]
    assert windows[0]["predictions"] == 0 and windows[1]["predictions"] == 0
    assert windows[2 + OUTAGE_DAY]["predictions"] == 0
    for w in empty:
        assert w["labelled"] == 0 and w["implied_negatives"] == 0
        assert w["confusion"] == {"tp": 0, "fp": 0, "fn": 0, "tn": 0}
        assert w["measures"]["precision"]["value"] is None
    # only the current window is open
    assert [w["closed"] for w in windows] == [True] * (len(windows) - 1) + [False]
    assert windows[-1]["start"] == stamp(align(NOW, "day"))
    expected = [
        settled(
            w["predictions"],
            w["labelled"],
            START - timedelta(days=2) + timedelta(days=i + 1),
            NOW,
            SETTINGS["min_coverage"],
            SETTINGS["label_delay_days"],
        )
        for i, w in enumerate(windows)
    ]
    got = [w["settled"] for w in windows]
    for e, g in zip(expected, got, strict=True):
        if e is not None:
            assert g is e
    # the data must exercise both outcomes of the settled rule
    busy = [e for e, w in zip(expected, windows, strict=True) if w["predictions"]]
    assert True in busy and False in busy


def test_hourly_and_iso_weekly_windows_equal_sklearn(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    ingest(tenant.client, model.name, sc, NOW)
    labelled, y, implied = effective(sc, NOW)
    start, end = align(START, "week"), align(NOW, "week") + timedelta(days=7)
    assert start.weekday() == 0 and start < START  # the first ISO week starts before the data
    weekly = metrics(
        tenant.client, model.name, granularity="week", start=stamp(START), end=stamp(NOW)
    )  # both ends aligned down to Mondays
    check_range(weekly, "week", start, align(NOW, "week"), sc, labelled, y, implied)
    weekly = metrics(
        tenant.client, model.name, granularity="week", start=stamp(start), end=stamp(end), beta=2
    )
    check_range(weekly, "week", start, end, sc, labelled, y, implied, beta=2.0)
    assert weekly["windows"][-1]["closed"] is False
    assert sum(w["predictions"] for w in weekly["windows"]) == len(sc.pids)
    hstart, hend = START - timedelta(hours=3), align(NOW, "hour") + timedelta(hours=1)
    hourly = metrics(
        tenant.client, model.name, granularity="hour", start=stamp(hstart), end=stamp(hend)
    )
    check_range(hourly, "hour", hstart, hend, sc, labelled, y, implied, full=False)
    assert [w["closed"] for w in hourly["windows"]].count(False) == 1
    assert hourly["windows"][-1]["closed"] is False


def test_default_range_ends_with_the_open_current_window(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    ingest(tenant.client, model.name, sc, NOW)
    labelled, y, implied = effective(sc, NOW)
    for granularity in ("day", "hour", "week"):
        answer = metrics(tenant.client, model.name, granularity=granularity)
        end = align(NOW, granularity) + STEPS[granularity]
        start = end - 30 * STEPS[granularity]
        assert len(answer["windows"]) == 30
        check_range(
            answer, granularity, start, end, sc, labelled, y, implied, full=granularity != "hour"
        )
        assert answer["windows"][-1]["closed"] is False
        assert all(w["closed"] for w in answer["windows"][:-1])


def _answers(tenant: Tenant, model: str) -> list[dict[str, Any]]:
    start, end = stamp(START - timedelta(days=1)), stamp(NOW + timedelta(days=1))
    return [
        metrics(tenant.client, model, granularity=g, start=start, end=end, **extra)
        for g, extra in (
            ("hour", {}),
            ("day", {}),
            ("week", {}),
            ("day", {"tag.region": "north"}),
            ("day", {"rolling": 3}),
        )
    ]


def test_rebuild_from_raw_rows_equals_the_incremental_path(
    tenant: Tenant, engine: Engine, sessions: Any, store_url: str, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    send(tenant.client, model.name, "predictions", sc.prediction_items())
    waves = [START + timedelta(days=25), START + timedelta(days=28), NOW]
    before = None
    for when in waves:  # labels arrive in waves; every read refreshes some buckets
        clock.set(when)
        send(tenant.client, model.name, "labels", sc.label_items(sc.known(when, before)))
        metrics(tenant.client, model.name, start=stamp(START), end=stamp(NOW))
        before = when
    incremental_rollups, incremental = (
        stored_rollups(engine, model.id),
        _answers(tenant, model.name),
    )
    assert any(k[2] == "region" for k in incremental_rollups)

    assert refresh.rebuild(sessions, max_values=100, model_id=model.id) > 0
    assert_close(stored_rollups(engine, model.id), incremental_rollups)
    assert_close(_answers(tenant, model.name), incremental)

    # the command line: first spoil a stored rollup, which the rebuild must put right
    with engine.begin() as conn:
        conn.execute(
            text(
                "UPDATE rollups SET tp = tp + 100, brier_sum = brier_sum * 3"
                " WHERE model_id = :m AND level = 'd'"
            ),
            {"m": model.id},
        )
    env = {**os.environ, "BELATED_DATABASE_URL": store_url}
    done = subprocess.run(
        [
            str(REPO / ".venv/bin/belated"),
            "rebuild",
            "--model",
            model.name,
            "--project",
            tenant.name,
        ],
        env=env,
        cwd=REPO / "tests",
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert done.returncode == 0, done.stderr
    assert "rebuilt" in done.stdout
    assert_close(stored_rollups(engine, model.id), incremental_rollups)
    assert_close(_answers(tenant, model.name), incremental)
    with engine.connect() as conn:
        left = conn.execute(
            text("SELECT count(*) FROM dirty_buckets WHERE model_id = :m"), {"m": model.id}
        ).scalar_one()
    assert left == 0
