"""Late labels folded into stored rollups by difference, checked against scikit-learn and a rebuild.

A label for a prediction whose hour is already aggregated is logged as a change (old state,
new state); the refresh subtracts the old state's contribution and adds the new one's
instead of aggregating the hour's rows again. These tests follow the hard cases: an old
state that was an implied negative, corrections, pending labels joined by the sweep, and an
hour whose segments changed since it was aggregated (which must be aggregated again).
Reference: scikit-learn's metrics on the rows of each daily window (tests/support/datasets.py),
and the rollups a rebuild from raw rows writes (counts exactly, float sums within 1e-9
relative).
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import timedelta
from typing import Any

import numpy as np
import pytest
from sqlalchemy import Engine, text

from belated.clock import clock
from belated.store import refresh, rollups
from belated.store.tables import PendingLabel
from tests.conftest import Tenant
from tests.support import (
    base_time,
    count,
    create_model,
    label,
    predictions,
    rows,
    send,
    stamp,
    stored_rollups,
    three_class_scores,
)
from tests.support.datasets import (
    NOW,
    START,
    STEPS,
    assert_close,
    at,
    breast_cancer,
    check_window,
    effective,
    in_range,
    metrics,
    window_starts,
)

SETTINGS = {"label_delay_days": 14, "min_coverage": 0.8}
RANGE = (START, START + timedelta(days=25))


@pytest.fixture()
def spy(monkeypatch: pytest.MonkeyPatch) -> list[tuple[bool, int]]:
    """(changes?, hours) of every aggregation the refresh runs (the real one runs)."""
    calls: list[tuple[bool, int]] = []
    real = rollups.compute

    def recording(session: Any, scope: Any, keys: Any) -> Any:
        calls.append((scope.of_changes, len(scope.hours)))
        return real(session, scope, keys)

    monkeypatch.setattr(rollups, "compute", recording)
    return calls


def _marks(engine: Engine, model_id: int) -> dict[int, bool]:
    return {
        int(h): bool(r)
        for h, r in rows(
            engine, "SELECT hour, recompute FROM dirty_buckets WHERE model_id = :m", m=model_id
        )
    }


def _check_days(tenant: Tenant, model: str, sc: Any, *state: np.ndarray) -> None:
    answer = metrics(tenant.client, model, start=stamp(RANGE[0]), end=stamp(RANGE[1]))
    everything = np.ones(len(sc.pids), bool)
    for w, s in zip(answer["windows"], window_starts("day", *RANGE), strict=True):
        check_window(w, sc, everything & in_range(sc.ts, s, s + STEPS["day"]), *state)


def _without_cut(found: dict[Any, Any]) -> dict[Any, Any]:
    # the cutoff an hour was aggregated with depends on when; everything else must agree
    return {k: {c: v for c, v in r.items() if c != "negative_cutoff"} for k, r in found.items()}


def test_labels_on_implied_negatives_and_corrections_fold_into_stored_hours(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None, spy: list[tuple[bool, int]]
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, negative_after_days=10, **SETTINGS)
    t1 = START + timedelta(days=26)
    clock.set(t1)
    send(tenant.client, model.name, "predictions", sc.prediction_items())
    known_t1 = sc.known(t1)
    send(tenant.client, model.name, "labels", sc.label_items(known_t1))
    assert refresh.refresh_all(sessions, max_values=100, model_id=model.id) > 0
    assert count(engine, "label_changes", model.id) == 0

    clock.set(NOW)
    refresh.join_and_mark(sessions)  # hours crossing the ten days since: aggregated again
    assert refresh.refresh_all(sessions, max_values=100, model_id=model.id) > 0
    spy.clear()

    late = sc.known(NOW, after=t1)
    implied = effective(sc, NOW, known=known_t1, negative_after_days=10)[2]
    assert (late & implied & (sc.actual == 1)).any()  # implied negatives that were positive
    send(tenant.client, model.name, "labels", sc.label_items(late))
    rng = np.random.default_rng(5)
    flipped = rng.choice(np.flatnonzero(known_t1), 25, replace=False)
    corrected = sc.actual.copy()
    corrected[flipped] = 1 - corrected[flipped]
    fixes = [
        {
            "id": sc.pids[i],
            "actual": str(int(corrected[i])),
            "ts": stamp(at(sc.label_at[i]) + timedelta(hours=2)),
        }
        for i in flipped
    ]
    assert send(tenant.client, model.name, "labels", fixes)["corrected"] == len(flipped)

    marks = _marks(engine, model.id)
    touched = {int(t // 3600) for t in sc.ts[late | np.isin(np.arange(len(sc.pids)), flipped)]}
    assert set(marks) == touched and not any(marks.values())  # labels only: no recompute
    assert count(engine, "label_changes", model.id) == int(late.sum()) + len(flipped)

    assert refresh.refresh_all(sessions, max_values=100, model_id=model.id) == len(touched)
    assert spy and all(changes for changes, _ in spy)  # folded, never aggregated from rows
    assert count(engine, "label_changes", model.id) == 0
    _check_days(
        tenant, model.name, sc, *effective(sc, NOW, actual=corrected, negative_after_days=10)
    )
    folded = stored_rollups(engine, model.id)
    refresh.rebuild(sessions, max_values=100, model_id=model.id)
    assert_close(_without_cut(stored_rollups(engine, model.id)), _without_cut(folded))


def test_a_pending_label_joined_by_the_sweep_is_folded(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None, spy: list[tuple[bool, int]]
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    send(tenant.client, model.name, "predictions", sc.prediction_items())
    known = sc.known(NOW)
    first = np.flatnonzero(known)[:40]
    rest = known.copy()
    rest[first] = False
    send(tenant.client, model.name, "labels", sc.label_items(rest))
    refresh.refresh_all(sessions, max_values=100, model_id=model.id)
    # pending rows as a concurrent write leaves them: a label stored before its prediction
    # was visible (the ingest path joins them at once otherwise)
    with sessions.begin() as session:
        for i in first:
            session.execute(
                PendingLabel.__table__.insert().values(
                    model_id=model.id,
                    pid=sc.pids[i],
                    actual=str(int(sc.actual[i])),
                    ts=at(sc.label_at[i]),
                    received_at=NOW,
                )
            )
    spy.clear()
    refresh.join_and_mark(sessions)
    assert count(engine, "pending_labels", model.id) == 0
    assert count(engine, "label_changes", model.id) == len(first)
    assert not any(_marks(engine, model.id).values())
    refresh.refresh_all(sessions, max_values=100, model_id=model.id)
    assert spy and all(changes for changes, _ in spy)
    _check_days(tenant, model.name, sc, *effective(sc, NOW))


def test_an_hour_whose_segments_grew_since_is_aggregated_again(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None, spy: list[tuple[bool, int]]
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    send(tenant.client, model.name, "predictions", sc.prediction_items())
    # one region value admitted at first: the others roll up under '(other)' in every hour
    refresh.refresh_all(sessions, max_values=1, model_id=model.id)
    # a later refresh with room for more admits the rest when it sees them in new rows
    # (after the checked range, so that its daily windows hold the scenario's rows only)
    extra = breast_cancer(prefix="more").prediction_items(np.arange(30))
    for k, item in enumerate(extra):
        item["ts"] = stamp(RANGE[1] + timedelta(hours=k))
    send(tenant.client, model.name, "predictions", extra)
    refresh.refresh_all(sessions, max_values=100, model_id=model.id)
    admitted = {
        v
        for (v,) in rows(
            engine,
            "SELECT value FROM segment_values WHERE model_id = :m AND key = 'region'",
            m=model.id,
        )
    }
    assert len(admitted) > 1
    spy.clear()

    known = sc.known(NOW)
    send(tenant.client, model.name, "labels", sc.label_items(known))
    refresh.refresh_all(sessions, max_values=100, model_id=model.id)
    # hours aggregated before the admission cannot take a difference for the new segments
    assert any(changes for changes, _ in spy) and any(not changes for changes, _ in spy)
    folded = stored_rollups(engine, model.id)
    # every labelled row's admitted region has its own row in its hour now: those hours
    # were aggregated again (a difference cannot create a segment's row)
    for i in np.flatnonzero(known):
        if str(sc.region[i]) in admitted:
            assert ("h", int(sc.ts[i] // 3600), "region", str(sc.region[i])) in folded
    assert count(engine, "label_changes", model.id) == 0
    _check_days(tenant, model.name, sc, *effective(sc, NOW))
    # whole-model rows agree with a rebuild; the rebuild also splits '(other)' in hours that
    # no label touched, which the incremental path leaves as they were aggregated
    refresh.rebuild(sessions, max_values=100, model_id=model.id)
    rebuilt = stored_rollups(engine, model.id)
    whole = {k: v for k, v in folded.items() if k[2] == ""}
    assert_close(_without_cut({k: rebuilt[k] for k in whole}), _without_cut(whole))


COLS = ("n_pred", "n_labelled", "n_implied", "tp", "fp", "fn", "tn", "cells")


@pytest.fixture()
def hour0() -> Iterator[Any]:
    """An hour five days ago, with the clock where a one-day cutoff falls inside it."""
    h = (base_time() - timedelta(days=5)).replace(minute=0)
    clock.set(h + timedelta(days=1, minutes=30))
    yield h
    clock.set(None)


def _overall_hour(engine: Engine, model_id: int) -> dict[str, Any]:
    found = [r for k, r in stored_rollups(engine, model_id).items() if k[0] == "h" and k[2] == ""]
    assert len(found) == 1
    return {c: found[0][c] for c in COLS}


@pytest.mark.parametrize("how", ["setting dropped", "hour aggregated before cutoffs stored"])
@pytest.mark.parametrize("kind", ["binary", "multiclass"])
def test_an_old_implied_negative_is_judged_as_its_hour_counted_it(
    tenant: Tenant, engine: Engine, sessions: Any, hour0: Any, how: str, kind: str
) -> None:
    classes = ("a", "b", "c")
    if kind == "binary":
        model = create_model(tenant, engine, negative_after_days=1)
        items = predictions(2, base=hour0) + predictions(2, start=50, base=hour0)
        for it in items:
            it["score"] = 0.42  # one histogram bin, kept non-empty by the later rows
        outcome = "1"
    else:
        model = create_model(
            tenant, engine, kind="multiclass", classes=list(classes), negative_after_days=1
        )
        items = predictions(3, base=hour0)
        for it in items:
            it.pop("score")
            it["scores"] = three_class_scores("b", 0.6, classes)
        outcome = "c"
    r = tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": items})
    assert r.status_code == 200, r.text
    refresh.refresh_all(sessions, max_values=100, model_id=model.id)
    assert _overall_hour(engine, model.id)["n_implied"] > 0  # the first rows are past the cut
    if how == "setting dropped":
        r = tenant.client.patch(f"/v1/models/{model.name}", json={"negative_after_days": None})
        assert r.status_code == 200, r.text
    else:  # what an upgrade to revision 0003 leaves: hourly rows without their cutoff
        with engine.begin() as conn:
            conn.execute(
                text("UPDATE rollups SET negative_cutoff = NULL WHERE model_id = :m"),
                {"m": model.id},
            )
    r = tenant.client.post(
        f"/v1/models/{model.name}/labels", json={"labels": [label(items[0]["id"], outcome)]}
    )
    assert r.status_code == 200, r.text
    refresh.refresh_all(sessions, max_values=100, model_id=model.id)
    folded = _overall_hour(engine, model.id)
    assert folded["n_labelled"] <= folded["n_pred"]
    refresh.rebuild(sessions, max_values=100, model_id=model.id)
    assert folded == _overall_hour(engine, model.id)
