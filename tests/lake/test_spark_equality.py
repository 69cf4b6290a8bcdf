"""The lake job on Spark (local mode) equals belated's own HTTP ingest and refresh, row by
row, on both stores; from Parquet paths and from DataFrames alike.

Spark needs Java 17 (scripts/test-deps.sh installs Debian's openjdk-17-jre-headless):
without it these tests fail, they are not skipped. The data stay small (2,000 orders and
their labels) and the Spark rows are computed once per module, so the session's start and
the job cost well under the suite's budget.
"""

from __future__ import annotations

from typing import Any

import pytest
from sqlalchemy import Engine

from belated.lake import build_totals
from belated.lake.spark import SparkEngine
from belated.store.rollups import Key
from belated.store.totals import Totals
from tests.conftest import Tenant
from tests.support.lake import (
    LAKE_MODEL,
    NOW,
    ShopLogs,
    assert_same_rollups,
    http_twin,
    shop_logs,
    stored,
)


@pytest.fixture(scope="module")
def spark_run(
    tmp_path_factory: pytest.TempPathFactory,
) -> tuple[ShopLogs, tuple[str, str], dict[Key, Totals]]:
    """Small shop logs as Parquet, and their rollup rows computed by Spark."""
    logs = shop_logs(n=2000, seed=11)
    paths = logs.write(tmp_path_factory.mktemp("spark"))
    return logs, paths, build_totals(*paths, LAKE_MODEL, now=NOW, engine="spark")


def test_spark_rows_equal_the_http_path(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None, spark_run: Any
) -> None:
    logs, _, spark = spark_run
    twin = http_twin(tenant, engine, sessions, logs)
    want = stored(engine, twin.id)
    assert_same_rollups(spark, want)
    assert sum(t["n_implied"] for (_, k, _), t in want.items() if k == "") > 50


def test_spark_takes_dataframes_and_only_the_hours_asked(spark_run: Any) -> None:
    _, (preds, labels), spark = spark_run
    eng = SparkEngine()
    try:
        frames = [eng.spark.read.parquet(p) for p in (preds, labels)]
        some = {h for (h, _, _) in spark if h % 7 == 0}
        got = build_totals(*frames, LAKE_MODEL, now=NOW, engine=eng, hours=some)
    finally:
        eng.close()
    assert some
    assert_same_rollups(got, {k: t for k, t in spark.items() if k[0] in some})
