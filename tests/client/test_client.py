"""The Python client against the live service: batched sends, refusals, retries, metrics.

Outside checks: the confusion counts and precision of each window against scikit-learn's
`confusion_matrix` and `precision_score` on the same orders grouped by UTC day with pandas.
"""

from __future__ import annotations

import threading
from datetime import UTC, datetime, timedelta
from email.utils import format_datetime
from typing import Any

import httpx
import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import confusion_matrix, precision_score
from sqlalchemy import Engine

from belated.client import BelatedError, Client, Unreachable, rfc3339
from tests.client import shop_orders
from tests.conftest import LiveServer, Tenant
from tests.support import count, create_model, prediction_row, rows, unique_name


def as_predictions(orders: pd.DataFrame) -> pd.DataFrame:
    """The client's DataFrame layout: API names, tags as tag.<key> columns."""
    return orders.rename(columns={"channel": "tag.channel", "region": "tag.region"}).drop(
        columns="actual"
    )


def token(tenant: Tenant) -> str:
    """The all-scopes token of the tenant."""
    return tenant.tokens["admin,ingest,read"]


def nan(value: Any) -> float:
    """JSON null as NaN, the DataFrame's spelling of an undefined value."""
    return np.nan if value is None else float(value)


def test_frames_and_dicts_are_batched_and_answers_summed(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    orders = shop_orders(2_500, seed=11)
    frame = as_predictions(orders)
    assert frame["id"].dtype == "str" and frame["ts"].dt.tz is not None  # pandas 3 types
    seen: list[int] = []
    with Client(live.url, token(tenant), batch_size=1_000) as c:
        got = c.send_predictions(model.name, frame, progress=lambda n, _: seen.append(n))
        assert got == {"accepted": 2_500, "duplicates": 0}
        assert seen == [1_000, 1_000, 500]
        # The same rows as dicts holding numpy scalars and pandas Timestamps: all duplicates.
        records = frame.to_dict("records")
        assert isinstance(records[0]["score"], float | np.floating)
        assert c.send_predictions(model.name, records, batch_size=700) == {
            "accepted": 0,
            "duplicates": 2_500,
        }
        answer = c.model(model.name)
    assert count(engine, "predictions", model.id) == 2_500
    assert answer["counts"]["predictions"] == 2_500
    stored = prediction_row(engine, model.id, "ord-0000042")
    assert stored["ts"] == orders["ts"][42].to_pydatetime()
    assert stored["score"] == orders["score"][42]
    assert stored["tags"] == {"channel": orders["channel"][42], "region": orders["region"][42]}

    labels = pd.DataFrame({"id": orders["id"][:1_200], "actual": orders["actual"][:1_200]})
    unknown = [{"id": f"ord-late-{i}", "actual": np.int64(1)} for i in range(150)]
    flipped = labels[:300].assign(actual=1 - labels["actual"][:300])
    with Client(live.url, token(tenant), batch_size=500) as c:
        assert c.send_labels(model.name, labels) == {
            "matched": 1_200,
            "pending": 0,
            "corrected": 0,
            "unchanged": 0,
            "expired": 0,
        }
        assert c.send_labels(model.name, unknown) == {
            "matched": 0,
            "pending": 150,
            "corrected": 0,
            "unchanged": 0,
            "expired": 0,
        }
        assert c.send_labels(model.name, pd.concat([flipped, labels[300:400]])) == {
            "matched": 0,
            "pending": 0,
            "corrected": 300,
            "unchanged": 100,
            "expired": 0,
        }
        assert c.model(model.name)["counts"] == {
            "predictions": 2_500,
            "labelled": 1_200,
            "pending_labels": 150,
        }


def test_metrics_frame_matches_the_json_and_scikit_learn(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    orders = shop_orders(4_000, seed=12, days=4)
    labelled = orders[:3_000]
    start = datetime.now(UTC) - timedelta(days=6)
    with Client(live.url, token(tenant)) as c:
        c.send_predictions(model.name, as_predictions(orders))
        c.send_labels(model.name, labelled[["id", "actual"]])
        frame = c.metrics(model.name, granularity="day", start=start)
    answer = tenant.client.get(
        f"/v1/models/{model.name}/metrics", params={"granularity": "day", "start": rfc3339(start)}
    ).json()
    assert len(frame) == len(answer["windows"]) == 7
    assert str(frame["start"].dt.tz) == "UTC" and str(frame["end"].dt.tz) == "UTC"
    for (_, row), w in zip(frame.iterrows(), answer["windows"], strict=True):
        assert row["start"] == pd.Timestamp(w["start"]) and row["end"] == pd.Timestamp(w["end"])
        for key in ("predictions", "labelled", "implied_negatives", "closed", "settled"):
            assert row[key] == w[key], key
        assert row["coverage"] == pytest.approx(nan(w["coverage"]), nan_ok=True)
        for key in ("tp", "fp", "fn", "tn"):
            assert row[key] == w["confusion"][key]
        for name, m in w["measures"].items():
            for suffix, part in (("", "value"), ("_low", "low"), ("_high", "high")):
                assert row[name + suffix] == pytest.approx(nan(m[part]), nan_ok=True)
        for name, b in (w["bounds"] or {}).items():
            assert row[f"{name}_bound_low"] == pytest.approx(nan(b["low"]), nan_ok=True)
        assert row["implied_precision"] == pytest.approx(
            nan(w["implied"]["precision"]["value"]), nan_ok=True
        )

    # The same windows from the raw orders, outside the service: pandas and scikit-learn.
    day = orders["ts"].dt.floor("D")
    for _, row in frame.iterrows():
        mine = orders[day == row["start"]]
        assert row["predictions"] == len(mine)
        lab = mine[mine["id"].isin(labelled["id"])]
        assert row["labelled"] == len(lab)
        if len(lab) == 0:
            continue
        predicted = (lab["score"] >= 0.5).astype(int)
        tn, fp, fn, tp = confusion_matrix(lab["actual"], predicted, labels=[0, 1]).ravel()
        assert (row["tp"], row["fp"], row["fn"], row["tn"]) == (tp, fp, fn, tn)
        if tp + fp:
            assert row["precision"] == pytest.approx(precision_score(lab["actual"], predicted))


def test_metrics_parameters_pass_through(live: LiveServer, tenant: Tenant, engine: Engine) -> None:
    model = create_model(tenant, engine)
    orders = shop_orders(1_500, seed=13, days=2)
    params = {
        "granularity": "hour",
        "rolling": 3,
        "measures": ["precision", "recall"],
        "tag.channel": "web",
    }
    with Client(live.url, token(tenant)) as c:
        c.send_predictions(model.name, as_predictions(orders))
        c.send_labels(model.name, orders[["id", "actual"]])
        frame = c.metrics(model.name, **params)
    answer = tenant.client.get(
        f"/v1/models/{model.name}/metrics", params={**params, "measures": "precision,recall"}
    ).json()
    assert frame.attrs["rolling"] == 3 and frame.attrs["tags"] == {"channel": "web"}
    assert {"precision", "recall_high"} <= set(frame.columns)
    assert "fbeta" not in frame.columns and "accuracy" not in frame.columns
    assert frame["precision"].tolist() == pytest.approx(
        [nan(w["measures"]["precision"]["value"]) for w in answer["windows"]], nan_ok=True
    )
    # Rolling windows of three hours over the web orders only: the last window's count.
    last = frame.iloc[-1]
    web = orders[
        (orders["channel"] == "web")
        & (orders["ts"] >= last["end"] - pd.Timedelta(hours=3))
        & (orders["ts"] < last["end"])
    ]
    assert last["predictions"] == len(web)


def test_multiclass_scores_columns_and_per_class_measures(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    classes = ["kept", "returned", "exchanged"]
    model = create_model(tenant, engine, kind="multiclass", classes=classes)
    rng = np.random.default_rng(14)
    n = 600
    probs = rng.dirichlet([4.0, 2.0, 1.0], n)
    orders = shop_orders(n, seed=14, days=1)
    frame = pd.DataFrame(
        {
            "id": orders["id"],
            "ts": orders["ts"],
            **{f"score.{c}": probs[:, k] for k, c in enumerate(classes)},
        }
    )
    actual = [classes[rng.choice(3, p=p)] for p in probs]
    with Client(live.url, token(tenant)) as c:
        assert c.send_predictions(model.name, frame)["accepted"] == n
        c.send_labels(
            model.name, [{"id": i, "actual": a} for i, a in zip(orders["id"], actual, strict=True)]
        )
        got = c.metrics(model.name, granularity="week")
    answer = tenant.client.get(
        f"/v1/models/{model.name}/metrics", params={"granularity": "week"}
    ).json()
    last = answer["windows"][-1]
    stored = rows(engine, "SELECT predicted FROM predictions WHERE model_id = :m", m=model.id)
    expected = [classes[k] for k in probs.argmax(axis=1)]
    assert sorted(r[0] for r in stored) == sorted(expected)
    assert got["labelled"].sum() == n
    for cls in classes:
        assert got[f"{cls}.precision"].iloc[-1] == pytest.approx(
            nan(last["per_class"][cls]["precision"]["value"]), nan_ok=True
        )
    assert got["precision_macro"].iloc[-1] == pytest.approx(
        nan(last["measures"]["precision_macro"]["value"])
    )


def test_a_422_carries_the_problem_and_stores_nothing_of_its_batch(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    frame = as_predictions(shop_orders(3_000, seed=15))
    frame.loc[1_203, "score"] = 1.5
    with (
        Client(live.url, token(tenant), batch_size=1_000) as c,
        pytest.raises(BelatedError) as caught,
    ):
        c.send_predictions(model.name, frame)
    err = caught.value
    assert (err.status, err.title) == (422, "Invalid input")
    assert err.errors == [
        {"index": 203, "field": "score", "reason": "not a finite number in [0, 1]"}
    ]
    assert "Nothing was stored" in err.detail and err.problem["status"] == 422
    assert err.offset == 1_000 and err.sent == {"accepted": 1_000, "duplicates": 0}
    assert count(engine, "predictions", model.id) == 1_000  # the first batch only


def test_a_404_and_a_401_carry_the_problem(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    with Client(live.url, token(tenant)) as c:
        with pytest.raises(BelatedError) as caught:
            c.metrics("no-such-model")
        assert caught.value.status == 404 and "no-such-model" in caught.value.detail
        with pytest.raises(BelatedError) as caught:
            c.send_predictions(
                "no-such-model", [{"id": "a", "ts": datetime.now(UTC), "score": 0.3}]
            )
        assert caught.value.status == 404 and caught.value.title == "Not found"
    with Client(live.url, "wrong-token") as c, pytest.raises(BelatedError) as caught:
        c.model("no-such-model")
    assert caught.value.status == 401
    stored = rows(
        engine,
        "SELECT count(*) FROM predictions p JOIN models m ON m.id = p.model_id"
        " WHERE m.project_id = :p",
        p=tenant.project_id,
    )
    assert stored[0][0] == 0


def test_model_thresholds_and_delays_match_the_json(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    orders = shop_orders(1_000, seed=16, days=3)
    with Client(live.url, token(tenant)) as c:
        made = c.create_model(
            name=unique_name(), threshold=np.float64(0.4), segment_keys=["channel"]
        )
        assert made["threshold"] == 0.4 and made["segment_keys"] == ["channel"]
        with pytest.raises(BelatedError) as caught:  # the same name again: 409, not retried
            c.create_model(name=made["name"])
        assert caught.value.status == 409
        c.send_predictions(made["name"], as_predictions(orders))
        c.send_labels(made["name"], orders[["id", "actual"]][:700])
        sweep = c.thresholds(made["name"], beta=2, precision_target=0.5)
        delays = c.delays(made["name"])
        one = c.model(made["name"])
    base = f"/v1/models/{made['name']}"
    assert (
        sweep
        == tenant.client.get(
            f"{base}/thresholds", params={"beta": 2, "precision_target": 0.5}
        ).json()
    )
    assert delays == tenant.client.get(f"{base}/delays").json()
    assert one == tenant.client.get(base).json()
    assert one["counts"] == {"predictions": 1_000, "labelled": 700, "pending_labels": 0}


def test_a_service_down_at_first_still_gets_every_row_once(
    app: Any, tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    frame = as_predictions(shop_orders(20_000, seed=17))
    # its port is bound now and refuses connections; it starts listening 3 s from now
    server = LiveServer(app, hold_port=True)
    starter = threading.Timer(3.0, server.__enter__)
    waits: list[float] = []

    def sleep(seconds: float) -> None:
        waits.append(seconds)
        threading.Event().wait(seconds)

    starter.start()
    try:
        with Client(server.url, token(tenant), batch_size=5_000, backoff=0.5, sleep=sleep) as c:
            got = c.send_predictions(model.name, frame)
    finally:
        starter.join()
        server.__exit__(None, None, None)
    assert waits, "the client never had to wait: the service was up from the start"
    assert got == {"accepted": 20_000, "duplicates": 0}
    assert count(engine, "predictions", model.id) == 20_000
    distinct = rows(
        engine, "SELECT count(DISTINCT pid) FROM predictions WHERE model_id = :m", m=model.id
    )
    assert distinct[0][0] == 20_000


def scripted(answers: list[httpx.Response | Exception]) -> tuple[httpx.MockTransport, list[Any]]:
    """A transport that plays the given answers in order and records the requests."""
    seen: list[httpx.Request] = []

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request)
        answer = answers[min(len(seen), len(answers)) - 1]
        if isinstance(answer, Exception):
            raise answer
        return answer

    return httpx.MockTransport(handler), seen


def busy(after: str | None) -> httpx.Response:
    """A 503 problem, as the service answers when its store is busy."""
    headers = {"Retry-After": after} if after is not None else {}
    return httpx.Response(
        503,
        headers=headers,
        json={
            "type": "about:blank",
            "title": "Service unavailable",
            "status": 503,
            "detail": "the store is unreachable or busy; retry shortly (nothing was stored)",
        },
    )


def test_503_is_retried_honouring_retry_after() -> None:
    when = datetime.now(UTC) + timedelta(seconds=20)
    transport, seen = scripted(
        [
            busy("3"),
            busy(format_datetime(when, usegmt=True)),
            busy(None),
            httpx.Response(200, json={"accepted": 2, "duplicates": 0}),
        ]
    )
    waits: list[float] = []
    c = Client("http://127.0.0.1:9", "t", transport=transport, sleep=waits.append, backoff=0.5)
    got = c.send_predictions(
        "m",
        [
            {"id": "a", "ts": "2026-01-01T00:00:00Z", "score": 0.1},
            {"id": "b", "ts": "2026-01-01T00:00:00Z", "score": 0.9},
        ],
    )
    assert got == {"accepted": 2, "duplicates": 0} and len(seen) == 4
    assert waits[0] == 3.0
    assert 17 <= waits[1] <= 20  # an HTTP date: the seconds until then
    assert 0.5 * 2**2 * 0.5 <= waits[2] <= 0.5 * 2**2  # no header: backoff with jitter
    assert seen[0].headers["authorization"] == "Bearer t"


def test_retries_are_bounded_and_refusals_are_not_retried() -> None:
    transport, seen = scripted([busy("1")])
    waits: list[float] = []
    c = Client("http://127.0.0.1:9", "t", transport=transport, sleep=waits.append, retries=4)
    with pytest.raises(BelatedError) as caught:
        c.model("m")
    assert caught.value.status == 503 and len(seen) == 5 and waits == [1.0] * 4

    transport, seen = scripted(
        [
            httpx.Response(
                422,
                json={
                    "title": "Invalid input",
                    "status": 422,
                    "detail": "bad",
                    "errors": [{"index": 0, "field": "id", "reason": "required"}],
                },
            )
        ]
    )
    c = Client("http://127.0.0.1:9", "t", transport=transport, sleep=waits.append)
    with pytest.raises(BelatedError) as caught:
        c.send_labels("m", [{"actual": 1}])
    assert len(seen) == 1 and caught.value.errors[0]["field"] == "id"


def test_connection_errors_are_retried_only_where_a_repeat_is_harmless() -> None:
    ok = httpx.Response(200, json={"accepted": 1, "duplicates": 0})
    transport, seen = scripted([httpx.ConnectError("refused"), httpx.ReadError("reset"), ok])
    c = Client("http://127.0.0.1:9", "t", transport=transport, sleep=lambda _s: None)
    assert c.send_batch("m", "predictions", [{"id": "a"}]) == {"accepted": 1, "duplicates": 0}
    assert len(seen) == 3
    # Creating a model is no ingest: a request that may have arrived is not sent again.
    transport, seen = scripted([httpx.ReadError("reset"), httpx.Response(201, json={})])
    c = Client("http://127.0.0.1:9", "t", transport=transport, sleep=lambda _s: None)
    with pytest.raises(Unreachable):
        c.create_model(name="m")
    assert len(seen) == 1
