"""A write racing a model's deletion: the rows it commits afterwards are swept by the jobs.

The high-volume tables keep `model_id` without a foreign key (store/tables.py), so nothing
stops a write that found its model before the deletion from committing after it. On
PostgreSQL the race is run for real: a writer's transaction has stored rows, the model is
deleted over HTTP meanwhile (answered at once, waiting on nothing), and the writer commits.
SQLite has one writer at a time, so there the writer comes second, with the model it looked
up before (as a request holding a cached look-up does).
"""

from __future__ import annotations

from datetime import timedelta
from typing import Any

from sqlalchemy import Engine

from belated.clock import clock
from belated.ingest.validate import LabelIn, PredictionIn
from belated.jobs.steps import STEPS
from belated.store import labels, purge
from belated.store import predictions as stored_predictions
from belated.store.db import transaction
from tests.conftest import Tenant
from tests.support import (
    MODEL_TABLES,
    base_time,
    counts,
    create_model,
    label,
    predictions,
    rows,
    utcnow,
)

DATA_TABLES = tuple(t for t in MODEL_TABLES if t != "threshold_changes")


def stale_write(sessions: Any, model_id: int, during: Any) -> None:
    """Store predictions and labels for `model_id` in one transaction, calling `during()`
    before it commits."""
    base = base_time()
    preds = [
        PredictionIn(f"order-{i}", base + timedelta(minutes=i), 0.1 * i, None, "1", None)
        for i in range(5)
    ]
    with transaction(sessions) as session:
        got = stored_predictions.ingest(
            session=session, model_id=model_id, preds=preds, batch_size=5
        )
        assert got == {"accepted": 5, "duplicates": 0}
        items = [LabelIn("order-0", "1", base + timedelta(days=1)), LabelIn("late", "0", base)]
        labels.ingest(session=session, model_id=model_id, items=items)
        during()


def registry_rows(engine: Engine, model_id: int) -> int:
    """Rows of the id registry for the model (PostgreSQL; SQLite has none)."""
    if engine.dialect.name != "postgresql":
        return 0
    return int(
        rows(engine, "SELECT count(*) FROM prediction_ids WHERE model_id = :m", m=model_id)[0][0]
    )


def tombstones(engine: Engine, model_id: int) -> int:
    """The model's tombstone rows in service_state (0 or 1)."""
    key = f"{purge.TOMBSTONE}{model_id}"
    return int(rows(engine, "SELECT count(*) FROM service_state WHERE key = :k", k=key)[0][0])


def test_rows_a_racing_write_commits_after_the_deletion_are_swept(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    kept = create_model(tenant, engine)
    doomed = create_model(tenant, engine)  # the largest id: the one SQLite would hand out again
    url = f"/v1/models/{doomed.name}"

    def delete() -> None:
        assert tenant.client.delete(url).status_code == 204

    if engine.dialect.name == "postgresql":
        stale_write(sessions, doomed.id, during=delete)
    else:
        delete()
        stale_write(sessions, doomed.id, during=lambda: None)
    left = counts(engine, doomed.id)
    # the race is real: without a foreign key the write's rows outlive the deletion
    assert left["predictions"] == 5 and left["labels"] > 0 and left["dirty_buckets"] > 0, left
    assert tombstones(engine, doomed.id) == 1
    # while the tombstone stands, a new model never takes the deleted one's id
    again = create_model(tenant, engine, name=doomed.name)
    assert again.id > doomed.id
    # one run of the jobs' sweep step removes them, and only them
    before_kept = counts(engine, kept.id)
    step = dict(STEPS)["sweep"]
    got = step(_Run(sessions))
    assert got["rows"] >= sum(left.values())
    assert counts(engine, doomed.id) == dict.fromkeys(MODEL_TABLES, 0)
    assert registry_rows(engine, doomed.id) == 0
    assert counts(engine, kept.id) == before_kept
    assert tombstones(engine, doomed.id) == 1  # kept while a write could still be in flight
    # past SWEEP_SECONDS the sweep drops the tombstone too
    clock.set(utcnow() + timedelta(seconds=purge.SWEEP_SECONDS + 60))
    step(_Run(sessions))
    assert tombstones(engine, doomed.id) == 0
    assert counts(engine, doomed.id) == dict.fromkeys(MODEL_TABLES, 0)


def test_a_deletion_leaves_no_row_in_any_data_table(tenant: Tenant, engine: Engine) -> None:
    model = create_model(tenant, engine)
    url = f"/v1/models/{model.name}"
    items = predictions(30, prefix="o")
    assert tenant.client.post(f"{url}/predictions", json={"predictions": items}).status_code == 200
    marks = [label(f"o-{i}", "1") for i in range(0, 30, 2)] + [label("not-yet", "0")]
    assert tenant.client.post(f"{url}/labels", json={"labels": marks}).status_code == 200
    assert all(counts(engine, model.id)[t] > 0 for t in DATA_TABLES)
    assert registry_rows(engine, model.id) == (30 if engine.dialect.name == "postgresql" else 0)
    assert tenant.client.delete(url).status_code == 204
    assert counts(engine, model.id) == dict.fromkeys(MODEL_TABLES, 0)
    assert registry_rows(engine, model.id) == 0


class _Run:
    """What a job step is given (jobs/steps.StepContext): the sessions of the store."""

    def __init__(self, sessions: Any) -> None:
        self.sessions = sessions
        self.settings = None
