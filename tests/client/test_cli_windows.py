"""`belated windows --model M`: the latest windows as a terminal table, checked against the API."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import Engine

from belated.client import Client
from tests.client import belated, invoke, shop_orders
from tests.conftest import LiveServer, Tenant
from tests.support import create_model

ALL = "admin,ingest,read"


def table_rows(text: str) -> list[list[str]]:
    """The body rows of a printed table, cell by cell (box-drawing or ASCII borders)."""
    out = []
    for line in text.splitlines():
        cells = [c.strip() for c in line.replace("|", "│").replace("┃", "│").split("│")[1:-1]]
        if cells and not all(len(c) > 1 and set(c) <= set("-━─═+") for c in cells):
            out.append(cells)
    return out


def shown(m: dict[str, Any]) -> str:
    """A measure as the table prints it: value [low, high] to three places."""
    if m["value"] is None:
        return "-"
    if m.get("low") is None or m.get("high") is None:
        return f"{m['value']:.3f}"
    return f"{m['value']:.3f} [{m['low']:.3f}, {m['high']:.3f}]"


@pytest.fixture()
def shop(live: LiveServer, tenant: Tenant, engine: Engine) -> str:
    """A model with 10 days of orders; 95% of those older than 3 days carry their outcome.

    Coverage alone never settles a window: days older than the 5-day label delay are
    settled, younger closed days are provisional."""
    model = create_model(tenant, engine, min_coverage=0.9, label_delay_days=5)
    orders = shop_orders(6_000, seed=31, days=10)
    old = orders["ts"] < orders["ts"].max() - pd.Timedelta(days=3)
    known = orders[old].sample(frac=0.95, random_state=np.random.default_rng(31))
    frame = orders.rename(columns={"channel": "tag.channel"}).drop(columns=["actual", "region"])
    with Client(live.url, tenant.tokens[ALL]) as c:
        c.send_predictions(model.name, frame)
        c.send_labels(model.name, known[["id", "actual"]])
    return model.name


def test_the_table_shows_the_latest_windows_as_the_api_gives_them(
    live: LiveServer, tenant: Tenant, shop: str
) -> None:
    run = belated(
        "windows", "--model", shop, "--last", "7", url=live.url, token=tenant.tokens["read"]
    )
    assert run.returncode == 0, run.stderr
    by_day = {
        w["start"][:10]: w
        for w in tenant.client.get(
            f"/v1/models/{shop}/metrics", params={"granularity": "day"}
        ).json()["windows"]
    }
    body = table_rows(run.stdout)
    assert body[0][:5] == ["start", "predictions", "labelled", "coverage", "state"]
    assert body[0][5:] == ["precision", "recall", "fbeta"]
    assert len(body) == 1 + 7
    days = [cells[0] for cells in body[1:]]
    assert days == sorted(days) and days[-1] == max(by_day)  # the latest, oldest first
    for cells in body[1:]:
        w = by_day[cells[0]]
        assert cells[1:3] == [str(w["predictions"]), str(w["labelled"])]
        assert cells[3] == f"{w['coverage']:.1%}"
        state = "open" if not w["closed"] else "settled" if w["settled"] else "provisional"
        assert cells[4] == state
        for m, cell in zip(("precision", "recall", "fbeta"), cells[5:], strict=True):
            if w["settled"] or w["projected"] is None:
                assert cell == shown(w["measures"][m])
            else:  # the projected value first, the labelled-only value beside it
                assert cell.startswith(f"proj {shown(w['projected'][m])}"), cell
                assert f"labelled {shown(w['measures'][m])}" in cell
    states = [row[4] for row in body[1:]]
    assert states[-1] == "open" and "settled" in states and "provisional" in states


def test_granularity_and_measures_are_chosen(live: LiveServer, tenant: Tenant, shop: str) -> None:
    run = belated(
        "windows",
        "--model",
        shop,
        "--granularity",
        "hour",
        "--last",
        "5",
        "--measures",
        "roc_auc,positive_rate",
        "--tag",
        "channel=web",
        url=live.url,
        token=tenant.tokens["read"],
    )
    assert run.returncode == 0, run.stderr
    by_hour = {
        w["start"][:16].replace("T", " "): w
        for w in tenant.client.get(
            f"/v1/models/{shop}/metrics", params={"granularity": "hour", "tag.channel": "web"}
        ).json()["windows"]
    }
    body = table_rows(run.stdout)
    assert body[0][5:] == ["roc_auc", "positive_rate"] and len(body) == 1 + 5
    for cells in body[1:]:
        w = by_hour[cells[0]]
        assert cells[1] == str(w["predictions"])
        assert cells[5:] == [shown(w["measures"][m]) for m in ("roc_auc", "positive_rate")]


def test_a_multiclass_model_shows_macro_averages(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    classes = ["kept", "returned", "exchanged"]
    model = create_model(tenant, engine, kind="multiclass", classes=classes)
    rng = np.random.default_rng(32)
    orders = shop_orders(500, seed=32, days=2)
    probs = rng.dirichlet([4.0, 2.0, 1.0], len(orders))
    with Client(live.url, tenant.tokens[ALL]) as c:
        c.send_predictions(
            model.name,
            [
                {"id": i, "ts": t, "scores": dict(zip(classes, p, strict=True))}
                for i, t, p in zip(orders["id"], orders["ts"], probs, strict=True)
            ],
        )
        c.send_labels(
            model.name,
            [
                {"id": i, "actual": classes[rng.choice(3, p=p)]}
                for i, p in zip(orders["id"], probs, strict=True)
            ],
        )
    run = belated(
        "windows", "--model", model.name, "--last", "3", url=live.url, token=tenant.tokens["read"]
    )
    assert run.returncode == 0, run.stderr
    body = table_rows(run.stdout)
    assert body[0][5:] == ["precision_macro", "recall_macro", "fbeta_macro"]
    last = tenant.client.get(f"/v1/models/{model.name}/metrics").json()["windows"][-1]
    assert body[-1][5] == shown(last["measures"]["precision_macro"])


def test_mistakes_exit_2_and_refusals_exit_1(live: LiveServer, tenant: Tenant, shop: str) -> None:
    read = tenant.tokens["read"]
    measure = invoke(
        "windows", "--model", shop, "--measures", "precision,charm", url=live.url, token=read
    )
    assert measure.exit_code == 2 and "unknown measure 'charm'" in measure.stderr
    grain = invoke("windows", "--model", shop, "--granularity", "month", url=live.url, token=read)
    assert grain.exit_code == 2 and "hour, day, week" in grain.stderr
    missing = invoke("windows", "--model", "no-such-model", url=live.url, token=read)
    assert missing.exit_code == 1 and "404" in missing.stderr
    scope = invoke("windows", "--model", shop, url=live.url, token=tenant.tokens["ingest"])
    assert scope.exit_code == 1 and "403" in scope.stderr
