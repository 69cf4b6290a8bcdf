"""`belated send predictions|labels FILE`: CSV and Parquet, batches, bad rows, exit codes.

The command runs in a child process against the live service; what it stored is read back
over the API and with SQL.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import Engine

from belated.cli import register
from belated.client import Client
from tests.client import belated, invoke, prediction_csv, shop_orders
from tests.conftest import LiveServer, Tenant, free_port
from tests.support import count, create_model, prediction_row, rows

ALL = "admin,ingest,read"


def stored_ids(engine: Engine, model_id: int) -> set[str]:
    """The ids of a model's stored predictions."""
    return {
        r[0] for r in rows(engine, "SELECT pid FROM predictions WHERE model_id = :m", m=model_id)
    }


@pytest.mark.slow
def test_200000_orders_from_csv_are_all_stored(
    live: LiveServer, tenant: Tenant, engine: Engine, tmp_path: Path
) -> None:
    model = create_model(tenant, engine)
    orders = shop_orders(200_000, seed=21, days=6)
    path = prediction_csv(orders, tmp_path / "orders.csv")
    run = belated(
        "send",
        "predictions",
        str(path),
        "--model",
        model.name,
        "--batch-size",
        "10000",
        url=live.url,
        token=tenant.tokens[ALL],
    )
    assert run.returncode == 0, run.stderr
    assert "200000 rows; 200000 accepted, 0 duplicates, 0 skipped" in run.stdout
    assert count(engine, "predictions", model.id) == 200_000
    got = tenant.client.get(f"/v1/models/{model.name}").json()
    assert got["counts"]["predictions"] == 200_000
    for k in (0, 77_777, 199_999):  # spot checks, field by field, against the frame
        row = prediction_row(engine, model.id, orders["id"][k])
        assert row["ts"] == orders["ts"][k].to_pydatetime()
        assert row["score"] == orders["score"][k]
        assert row["tags"] == {"channel": orders["channel"][k], "region": orders["region"][k]}
        assert row["predicted"] == ("1" if orders["score"][k] >= 0.5 else "0")

    # Labels for the first 50,000 orders, and 2,000 whose predictions have not arrived.
    labels = pd.concat(
        [
            orders[["id", "actual"]][:50_000],
            pd.DataFrame({"id": [f"ord-late-{i}" for i in range(2_000)], "actual": 0}),
        ]
    )
    labels.to_csv(tmp_path / "labels.csv", index=False)
    run = belated(
        "send",
        "labels",
        str(tmp_path / "labels.csv"),
        "--model",
        model.name,
        url=live.url,
        token=tenant.tokens[ALL],
    )
    assert run.returncode == 0, run.stderr
    assert "52000 rows; 50000 matched, 2000 pending, 0 corrected, 0 unchanged" in run.stdout
    got = tenant.client.get(f"/v1/models/{model.name}").json()
    assert got["counts"] == {"predictions": 200_000, "labelled": 50_000, "pending_labels": 2_000}
    assert count(engine, "pending_labels", model.id) == 2_000


def test_parquet_with_other_column_names(
    live: LiveServer, tenant: Tenant, engine: Engine, tmp_path: Path
) -> None:
    model = create_model(tenant, engine)
    orders = shop_orders(30_000, seed=22)
    pd.DataFrame(
        {
            "order_id": orders["id"],
            "placed_at": orders["ts"],
            "p_return": orders["score"],
            "attr_channel": orders["channel"],
            "basket_eur": np.round(orders["score"] * 900, 2),
        }
    ).to_parquet(tmp_path / "orders.parquet")
    run = belated(
        "send",
        "predictions",
        str(tmp_path / "orders.parquet"),
        "--model",
        model.name,
        "--id-column",
        "order_id",
        "--ts-column",
        "placed_at",
        "--score-column",
        "p_return",
        "--tag-prefix",
        "attr_",
        "--batch-size",
        "7000",
        url=live.url,
        token=tenant.tokens[ALL],
    )
    assert run.returncode == 0, run.stderr
    assert "30000 accepted, 0 duplicates" in run.stdout
    assert "columns not sent: basket_eur" in run.stderr
    assert count(engine, "predictions", model.id) == 30_000
    row = prediction_row(engine, model.id, orders["id"][123])
    assert row["tags"] == {"channel": orders["channel"][123]}
    assert row["ts"] == orders["ts"][123].to_pydatetime()

    # Labels from Parquet: integer classes and outcome times as a timestamp column.
    old = orders[orders["ts"] < orders["ts"].max() - pd.Timedelta(days=2)][:1_000]
    known_at = old["ts"] + pd.Timedelta(hours=30)
    pd.DataFrame({"id": old["id"], "returned": old["actual"], "ts": known_at}).to_parquet(
        tmp_path / "labels.parquet"
    )
    run = belated(
        "send",
        "labels",
        str(tmp_path / "labels.parquet"),
        "--model",
        model.name,
        "--actual-column",
        "returned",
        url=live.url,
        token=tenant.tokens["ingest"],
    )
    assert run.returncode == 0, run.stderr
    assert "1000 matched" in run.stdout
    k = old.index[5]
    row = prediction_row(engine, model.id, old["id"][k])
    assert row["actual"] == str(old["actual"][k])
    assert row["label_ts"] == known_at[k].to_pydatetime()


def test_multiclass_scores_from_score_columns(
    live: LiveServer, tenant: Tenant, engine: Engine, tmp_path: Path
) -> None:
    classes = ["kept", "returned", "exchanged"]
    model = create_model(tenant, engine, kind="multiclass", classes=classes)
    orders = shop_orders(2_000, seed=23)
    probs = np.random.default_rng(23).dirichlet([4.0, 2.0, 1.0], len(orders)).round(6)
    probs[:, 0] = 1.0 - probs[:, 1:].sum(axis=1)  # rounded, still summing to 1
    frame = pd.DataFrame(
        {
            "id": orders["id"],
            "ts": orders["ts"].dt.strftime("%Y-%m-%dT%H:%M:%SZ"),
            **{f"score.{c}": probs[:, k] for k, c in enumerate(classes)},
            "predicted": "kept",
            "tag.channel": orders["channel"],
        }
    )
    frame.to_csv(tmp_path / "mc.csv", index=False)
    run = belated(
        "send",
        "predictions",
        str(tmp_path / "mc.csv"),
        "--model",
        model.name,
        url=live.url,
        token=tenant.tokens[ALL],
    )
    assert run.returncode == 0, run.stderr
    row = prediction_row(engine, model.id, orders["id"][9])
    assert row["predicted"] == "kept"
    assert row["scores"] == pytest.approx(dict(zip(classes, probs[9], strict=True)), abs=1e-9)


def bad_orders(tmp_path: Path, n: int = 25_000) -> tuple[pd.DataFrame, Path]:
    """Orders as CSV with one out-of-range score at file line 13,458 (data row 13,456)."""
    orders = shop_orders(n, seed=24)
    path = prediction_csv(orders, tmp_path / "orders.csv")
    lines = path.read_text().splitlines()
    head, _, rest = lines[13_457].partition(",")
    ts, _, rest = rest.partition(",")
    lines[13_457] = ",".join([head, ts, "1.5", rest.partition(",")[2]])
    path.write_text("\n".join(lines) + "\n")
    return orders, path


@pytest.mark.parametrize("scopes", [ALL, "ingest"], ids=["checked-here", "checked-by-service"])
def test_a_bad_row_stops_with_its_line_and_nothing_of_its_batch_is_stored(
    live: LiveServer, tenant: Tenant, engine: Engine, tmp_path: Path, scopes: str
) -> None:
    model = create_model(tenant, engine)
    orders, path = bad_orders(tmp_path)
    run = belated(
        "send",
        "predictions",
        str(path),
        "--model",
        model.name,
        "--batch-size",
        "10000",
        url=live.url,
        token=tenant.tokens[scopes],
    )
    assert run.returncode == 1, run.stdout + run.stderr
    assert "line 13458: field 'score': not a finite number in [0, 1]" in run.stderr
    assert "nothing of lines 10002-20001 was stored" in run.stderr
    assert "10000 accepted" in run.stderr  # the batch before it
    assert count(engine, "predictions", model.id) == 10_000
    assert stored_ids(engine, model.id) == set(orders["id"][:10_000])


@pytest.mark.parametrize("scopes", [ALL, "ingest"], ids=["checked-here", "checked-by-service"])
def test_skip_bad_reports_and_skips_bad_rows(
    live: LiveServer, tenant: Tenant, engine: Engine, tmp_path: Path, scopes: str
) -> None:
    model = create_model(tenant, engine)
    orders, path = bad_orders(tmp_path)
    lines = path.read_text().splitlines()
    lines[2] = "," + lines[2].partition(",")[2]  # line 3: no id
    lines[20_001] = lines[20_001].replace("Z,", "Q,", 1)  # line 20003: ts
    dup = lines[500].split(",")
    dup[2] = "0.999"
    lines.insert(600, ",".join(dup))  # line 601: the id of line 501 with another score
    path.write_text("\n".join(lines) + "\n")
    with Client(live.url, tenant.tokens[ALL]) as c:  # stored before, with other content: 409
        c.send_predictions(
            model.name, [{"id": orders["id"][24_000], "ts": orders["ts"][0], "score": 0.123}]
        )
    run = belated(
        "send",
        "predictions",
        str(path),
        "--model",
        model.name,
        "--skip-bad",
        url=live.url,
        token=tenant.tokens[scopes],
    )
    assert run.returncode == 0, run.stderr
    for line, field in ((3, "'id'"), (601, "'id'"), (13_459, "'score'"), (20_003, "'ts'")):
        assert f"line {line}: field {field}" in run.stderr
    assert "line 24003: already stored with different content" in run.stderr
    assert "25001 rows; 24996 accepted, 0 duplicates, 5 skipped" in run.stdout
    assert count(engine, "predictions", model.id) == 24_996 + 1
    kept = stored_ids(engine, model.id)
    assert orders["id"][1] not in kept and orders["id"][13_456] not in kept
    assert orders["id"][499] in kept  # the first of the two rows with one id


def test_a_bad_label_names_its_line(
    live: LiveServer, tenant: Tenant, engine: Engine, tmp_path: Path
) -> None:
    model = create_model(tenant, engine)
    labels = pd.DataFrame({"id": [f"ord-{i}" for i in range(40)], "actual": ["1", "0"] * 20})
    labels.loc[30, "actual"] = "maybe"
    labels.to_csv(tmp_path / "labels.csv", index=False)
    run = belated(
        "send",
        "labels",
        str(tmp_path / "labels.csv"),
        "--model",
        model.name,
        url=live.url,
        token=tenant.tokens[ALL],
    )
    assert run.returncode == 1
    assert "line 32: field 'actual': required, one of the classes ['0', '1']" in run.stderr
    assert count(engine, "pending_labels", model.id) == 0
    assert count(engine, "labels", model.id) == 0


def test_usage_errors_exit_2_and_store_nothing(
    live: LiveServer, tenant: Tenant, engine: Engine, tmp_path: Path
) -> None:
    model = create_model(tenant, engine)
    path = prediction_csv(shop_orders(50, seed=25), tmp_path / "orders.csv")
    args = ("send", "predictions", str(path), "--model", model.name)
    no_url = invoke(*args, token=tenant.tokens[ALL])
    assert no_url.exit_code == 2 and "--url" in no_url.stderr
    no_column = invoke(*args, "--ts-column", "placed_at", url=live.url, token=tenant.tokens[ALL])
    assert no_column.exit_code == 2 and "no column for ts" in no_column.stderr
    no_file = invoke(
        "send",
        "predictions",
        str(tmp_path / "nope.csv"),
        "--model",
        model.name,
        url=live.url,
        token=tenant.tokens[ALL],
    )
    assert no_file.exit_code == 2
    bad_format = invoke(*args, "--format", "xlsx", url=live.url, token=tenant.tokens[ALL])
    assert bad_format.exit_code == 2 and "--format" in bad_format.stderr
    assert count(engine, "predictions", model.id) == 0


def test_refusals_and_an_absent_service_exit_1(
    live: LiveServer, tenant: Tenant, engine: Engine, tmp_path: Path
) -> None:
    path = prediction_csv(shop_orders(50, seed=26), tmp_path / "orders.csv")
    unknown = invoke(
        "send",
        "predictions",
        str(path),
        "--model",
        "no-such-model",
        url=live.url,
        token=tenant.tokens[ALL],
    )
    assert unknown.exit_code == 1 and "404" in unknown.stderr
    wrong = invoke(
        "send",
        "labels",
        str(path),
        "--model",
        "no-such-model",
        "--actual-column",
        "score",
        url=live.url,
        token="not-a-token",
    )
    assert wrong.exit_code == 1 and "401" in wrong.stderr
    away = invoke(
        "send",
        "predictions",
        str(path),
        "--model",
        "m",
        "--retries",
        "1",
        url=f"http://127.0.0.1:{free_port()}",
        token="t",
    )
    assert away.exit_code == 1 and "unreachable" in away.stderr.lower()
    stored = rows(
        engine,
        "SELECT count(*) FROM predictions p JOIN models m ON m.id = p.model_id"
        " WHERE m.project_id = :p",
        p=tenant.project_id,
    )
    assert stored[0][0] == 0


def test_registering_twice_adds_the_commands_once() -> None:
    from belated.cli import app

    register(app)
    register(app)
    assert [g.name for g in app.registered_groups].count("send") == 1
    names = [c.name or c.callback.__name__ for c in app.registered_commands if c.callback]
    assert names.count("windows") == 1
