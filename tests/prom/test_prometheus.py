"""GET /metrics parsed by the reference parser (prometheus_client), checked against the API."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families

from belated.clock import clock
from belated.jobs import JobRunner
from tests.conftest import Tenant, make_tenant
from tests.support.alert_days import day_rows
from tests.support.sending import send_both


def _samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    out = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


@pytest.fixture()
def fed(tenant: Tenant, engine: Any, settings: Any) -> Any:
    clock.set(datetime(2026, 11, 12, 12, tzinfo=UTC))
    c = tenant.client
    made = c.post("/v1/models", json={"name": "returns-v2", "label_delay_days": 2})
    assert made.status_code == 201
    rng = np.random.default_rng(5)
    for d in range(10):
        preds, labels = day_rows(
            rng,
            datetime(2026, 11, 1, tzinfo=UTC) + timedelta(days=d),
            positives=50,
            negatives=150,
            recall=0.8,
            prefix="o",
        )
        send_both(c, "returns-v2", preds, labels)
    runner = JobRunner(engine=engine, settings=settings)
    runner.tick()
    runner.leader.release()  # the run took the leader lock on PostgreSQL: give it back
    yield tenant
    clock.set(None)


def test_scrape_with_a_read_token_matches_the_metrics_api(fed: Tenant) -> None:
    c = fed.client
    text = c.get("/metrics", headers=fed.headers("read")).text
    samples = _samples(text)
    windows = c.get("/v1/models/returns-v2/metrics").json()["windows"]
    latest = [w for w in windows if w["settled"] and w["predictions"]][-1]
    labels = (("model", "returns-v2"),)
    for measure in ("precision", "recall", "fbeta"):
        got = samples[(f"belated_model_{measure}_ratio", labels)]
        assert got == pytest.approx(latest["measures"][measure]["value"], rel=1e-12)
    assert samples[("belated_model_label_coverage_ratio", labels)] == pytest.approx(
        latest["coverage"]
    )
    assert samples[("belated_model_open_alerts", labels)] == 0
    assert samples[("belated_ingested_predictions_total", ())] >= 2000


def test_scrape_without_a_token_shows_no_model_of_any_project(fed: Tenant) -> None:
    text = fed.client.get("/metrics", headers={"Authorization": ""}).text
    assert "returns-v2" not in text and "model=" not in text
    names = {name for name, _ in _samples(text)}
    assert "belated_store_up" in names and "belated_dirty_buckets" in names


def test_another_projects_token_sees_only_its_own_models(fed: Tenant, sessions: Any) -> None:
    other = make_tenant(sessions, fed.client)  # switches the client's default token
    text = fed.client.get("/metrics", headers=other.headers("read")).text
    assert "returns-v2" not in text
    bad = fed.client.get("/metrics", headers={"Authorization": "Bearer nope"})
    assert bad.status_code == 401


def test_drift_gauges_are_the_latest_closed_windows_drift(fed: Tenant) -> None:
    c = fed.client
    samples = _samples(c.get("/metrics", headers=fed.headers("read")).text)
    windows = c.get("/v1/models/returns-v2/metrics").json()["windows"]
    latest = [w for w in windows if w["closed"] and w["predictions"]][-1]
    assert latest["drift"]["against"]["kind"] == "reference"
    labels = (("model", "returns-v2"),)
    for key, name in (
        ("score_psi", "belated_model_score_psi"),
        ("score_js", "belated_model_score_js_distance"),
        ("positive_rate_change", "belated_model_positive_rate_change"),
    ):
        assert latest["drift"][key] is not None
        assert samples[(name, labels)] == pytest.approx(latest["drift"][key], rel=1e-12)
    start = datetime.fromisoformat(latest["start"]).timestamp()
    assert samples[("belated_model_drift_window_start_timestamp_seconds", labels)] == start
    # without a read token the model's figures are not shown
    anonymous = _samples(c.get("/metrics", headers={"Authorization": ""}).text)
    assert not any(name == "belated_model_score_psi" for name, _ in anonymous)
