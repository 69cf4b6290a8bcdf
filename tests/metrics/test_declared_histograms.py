"""A declared histogram (label delays per actual class) equals numpy histograms of the raw
rows, for the whole model and a segment, on both stores.

Delay bins written out by hand here (hourly to 48 h, 6-hourly to 168 h, daily to 400 days,
one open bin), independently of belated.stats.delays. Data: the breast cancer dataset that
scikit-learn ships (Wolberg, Street and Mangasarian 1995), scored and spread over time with
seeded delays (tests/support/datasets.py).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from sqlalchemy import Engine, text

from belated.store import packing
from belated.store.statistics import HISTOGRAM_BY_NAME
from tests.conftest import Tenant
from tests.support import create_model
from tests.support.datasets import NOW, breast_cancer, ingest

EDGES = np.array([*range(0, 49), *range(54, 169, 6), *range(192, 9601, 24), math.inf], float)


def _bins(hours: np.ndarray) -> np.ndarray:
    return np.minimum(
        np.searchsorted(EDGES, np.maximum(hours, 0.0), side="right") - 1, len(EDGES) - 2
    )


def _stored(
    engine: Engine, model_id: int, seg: tuple[str, str], name: str = "delays_by_class"
) -> np.ndarray:
    hist = HISTOGRAM_BY_NAME[name]
    total = np.zeros(hist.shape, np.int64)
    with engine.connect() as conn:
        for (blob,) in conn.execute(
            text(
                f"SELECT {name} FROM rollups WHERE model_id = :m AND level = 'h'"
                " AND seg_key = :k AND seg_value = :v"
            ),
            {"m": model_id, "k": seg[0], "v": seg[1]},
        ):
            total += packing.unpack(hist, bytes(blob) if blob else None)[0]
    return total


def test_delays_by_class_equal_numpy_histograms_of_the_raw_delays(
    tenant: Tenant, engine: Engine, frozen: Any
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine)
    ingest(tenant.client, model.name, sc, NOW)
    r = tenant.client.get(f"/v1/models/{model.name}/delays")  # a read refreshes its range
    assert r.status_code == 200, r.text
    known = sc.known(NOW)
    delays = (sc.label_at - sc.ts) / 3600
    n_bins = len(EDGES) - 1
    for seg, rows in ((("", ""), known), (("region", "north"), known & (sc.region == "north"))):
        want = np.stack(
            [
                np.bincount(_bins(delays[rows & (sc.actual == cls)]), minlength=n_bins)
                for cls in (1, 0)  # the declared order: positive, negative
            ]
        )
        got = _stored(engine, model.id, seg)
        assert got.sum() == rows.sum() > 0
        assert np.array_equal(got, want), seg


def test_delays_by_band_equal_numpy_histograms_of_the_raw_delays(
    tenant: Tenant, engine: Engine, frozen: Any
) -> None:
    """The score band is the tenth of [0, 1] the score lies in (bins of 0.1, the last one
    closed at 1), written here with numpy independently of the SQL."""
    sc = breast_cancer()
    model = create_model(tenant, engine)
    ingest(tenant.client, model.name, sc, NOW)
    r = tenant.client.get(f"/v1/models/{model.name}/delays")
    assert r.status_code == 200, r.text
    known = sc.known(NOW)
    delays = (sc.label_at - sc.ts) / 3600
    # the score bin k/100 as the service decides it (score >= k/100), then its tenth
    bins = np.minimum(np.searchsorted(np.arange(101) / 100, sc.score, side="right") - 1, 99)
    bands = bins // 10
    n_bins = len(EDGES) - 1
    want = np.zeros((2, 10, n_bins), np.int64)
    for c, cls in enumerate((1, 0)):
        for band in range(10):
            sel = known & (sc.actual == cls) & (bands == band)
            want[c, band] = np.bincount(_bins(delays[sel]), minlength=n_bins)
    got = _stored(engine, model.id, ("", ""), "delays_by_band")
    assert got.sum() == known.sum() > 0
    assert len(np.flatnonzero(got.sum(axis=(0, 2)))) >= 3  # several bands are used
    assert np.array_equal(got, want)
    # kept for the whole model only (declared so): a segment's rows have none
    assert not _stored(engine, model.id, ("region", "north"), "delays_by_band").any()
