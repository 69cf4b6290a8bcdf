"""Query parameters of the history endpoints, and a multiclass model against scikit-learn.

Every refusal is a 422 problem naming the parameter, and reads nothing into the store: the
data ingested before it stays exactly as it was, dirty marks included (the refusal comes
before any refresh). The multiclass reference is scikit-learn's confusion_matrix and
precision_recall_fscore_support (average None, macro, micro, weighted; zero_division=nan,
which leaves an undefined class out of the averages, as DESIGN.md asks) on the wine data
(`sklearn.datasets.load_wine`). Interval choices are checked against statsmodels'
proportion_confint (Wilson, Clopper-Pearson) and the Jeffreys interval from scipy.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import timedelta
from typing import Any

import numpy as np
import pytest
from scipy.stats import beta as beta_dist
from sklearn.datasets import load_wine
from sklearn.metrics import accuracy_score, confusion_matrix, precision_recall_fscore_support
from sqlalchemy import Engine
from statsmodels.stats.proportion import proportion_confint

from tests.conftest import Tenant
from tests.support import counts, create_model, predictions, send, stamp
from tests.support.datasets import (
    NOW,
    SEED,
    START,
    STEPS,
    align,
    at,
    breast_cancer,
    cross_fit,
    epoch,
    ingest,
    metrics,
    same,
    window_starts,
)

D = stamp(START)
LATER = stamp(START + timedelta(days=5))
BAD: list[tuple[str, dict[str, Any], str, str]] = [
    ("metrics", {"granularity": "month"}, "granularity", "hour, day, week"),
    ("metrics", {"start": LATER, "end": D}, "start", "before"),
    ("metrics", {"start": "last tuesday"}, "start", "RFC 3339"),
    ("metrics", {"start": D, "end": "whenever"}, "end", "RFC 3339"),
    ("metrics", {"end": "whenever"}, "end", "RFC 3339"),
    (
        "metrics",
        {"granularity": "hour", "start": stamp(START - timedelta(days=500)), "end": D},
        "end",
        "10000",
    ),
    ("metrics", {"beta": 0}, "beta", "positive"),
    ("metrics", {"beta": -1}, "beta", "positive"),
    ("metrics", {"beta": "inf"}, "beta", "finite"),
    ("metrics", {"beta": "nan"}, "beta", "finite"),
    ("metrics", {"beta": 2, "precision_weight": 0.2}, "beta|precision_weight", "not both"),
    ("metrics", {"precision_weight": 0}, "precision_weight", "(0, 1)"),
    ("metrics", {"precision_weight": 1}, "precision_weight", "(0, 1)"),
    ("metrics", {"precision_weight": 1.5}, "precision_weight", "(0, 1)"),
    ("metrics", {"precision_weight": "nan"}, "precision_weight", "(0, 1)"),
    ("metrics", {"segment": "region:north"}, "segment", "tag.<key>=<value>"),
    ("metrics", {"tag.region": ""}, "tag.region", "1-64"),
    ("metrics", {"tag.": "north"}, "tag.", "1-64"),
    ("metrics", {"tag.region": ["north", "south"]}, "tag.region", "twice"),
    ("metrics", {"measures": "precision,sharpness"}, "measures", "sharpness"),
    ("metrics", {"interval": "wald"}, "interval", "wilson"),
    ("metrics", {"confidence": 1.5}, "confidence", "(0, 1)"),
    ("metrics", {"resamples": 20000}, "resamples", "10000"),
    ("metrics", {"rolling": 0}, "rolling", "1"),
    ("thresholds", {"beta": 0}, "beta", "positive"),
    ("thresholds", {"precision_target": 1.5}, "precision_target", "1"),
    ("thresholds", {"start": LATER, "end": D}, "start", "before"),
    ("delays", {"start": "soon"}, "start", "RFC 3339"),
]


def _refusal_problem(r: Any, field: str, words: str) -> str | None:
    """Why a response is not the expected refusal, or None when it is."""
    if r.status_code != 422:
        return f"status {r.status_code}: {r.text[:200]}"
    if not r.headers["content-type"].startswith("application/problem+json"):
        return f"content-type {r.headers['content-type']}"
    body = r.json()
    if body.get("status") != 422 or not body.get("detail") or not body.get("errors"):
        return f"not a problem with errors: {body}"
    if body["errors"][0]["field"] not in field.split("|"):
        return f"field {body['errors'][0]['field']!r}, expected {field!r}"
    if words.lower() not in (body["errors"][0]["reason"] + body["detail"]).lower():
        return f"the reason does not say {words!r}: {body}"
    return None


def test_bad_parameters_are_a_422_naming_the_field_and_change_nothing(
    tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    send(tenant.client, model.name, "predictions", predictions(30, tags={"region": "north"}))
    before = counts(engine, model.id)
    assert before["dirty_buckets"] > 0
    wrong = {}
    for path, params, field, words in BAD:  # one model for all cases keeps this quick
        r = tenant.client.get(f"/v1/models/{model.name}/{path}", params=params)
        problem = _refusal_problem(r, field, words)
        if problem is None and counts(engine, model.id) != before:
            problem = f"the store changed: {counts(engine, model.id)} != {before}"
        if problem is not None:
            wrong[f"{path} {params}"] = problem
    assert wrong == {}


@dataclass(frozen=True)
class Wine:
    """The wine rows scored by cross-fitting, spread over days, most of them labelled."""

    pids: list[str]
    ts: np.ndarray
    proba: np.ndarray  # rows x classes
    actual: np.ndarray  # class index
    classes: tuple[str, ...]
    labelled: np.ndarray

    @property
    def predicted(self) -> np.ndarray:
        """The most probable class (the service's rule when `predicted` is not sent)."""
        return np.argmax(self.proba, axis=1)


def wine(days: int = 8) -> Wine:
    """Logistic regression on alcohol and malic acid (two folds), 90% labelled."""
    data = load_wine()
    proba = cross_fit(data.data[:, [0, 1]], data.target, SEED)
    rng = np.random.default_rng(SEED + 1)
    n = len(data.target)
    ts = np.floor(epoch(START) + rng.uniform(0, days * 86400, n))
    classes = tuple(str(c) for c in data.target_names)
    return Wine(
        [f"wine-{i:03d}" for i in range(n)],
        ts,
        proba,
        data.target.copy(),
        classes,
        rng.random(n) < 0.9,
    )


def check_multiclass(window: dict[str, Any], w: Wine, rows: np.ndarray, beta: float) -> None:
    """A multiclass window against scikit-learn on its labelled rows."""
    lab = rows & w.labelled
    yt, yp = w.actual[lab], w.predicted[lab]
    k = list(range(len(w.classes)))
    assert window["predictions"] == int(rows.sum())
    assert window["labelled"] == int(lab.sum())
    assert window["confusion"]["classes"] == list(w.classes)
    m = window["measures"]
    if not len(yt):
        assert window["confusion"]["matrix"] == [[0] * len(k) for _ in k]
        assert m["accuracy"]["value"] is None and m["fbeta_macro"]["value"] is None
        return
    assert window["confusion"]["matrix"] == confusion_matrix(yt, yp, labels=k).tolist()
    same(m["accuracy"], accuracy_score(yt, yp))
    per = precision_recall_fscore_support(yt, yp, labels=k, beta=beta, zero_division=np.nan)
    for i, name in enumerate(("precision", "recall", "fbeta")):
        for c, cls in enumerate(w.classes):
            same(window["per_class"][cls][name], per[i][c])
            if np.isnan(per[i][c]):  # left out of the averages, and named there
                assert cls in m[f"{name}_macro"]["reason"]
        for average in ("macro", "micro", "weighted"):
            ref = precision_recall_fscore_support(
                yt, yp, labels=k, beta=beta, average=average, zero_division=np.nan
            )
            same(m[f"{name}_{average}"], ref[i])


def test_multiclass_windows_equal_sklearn(tenant: Tenant, engine: Engine, frozen: None) -> None:
    w = wine()
    model = create_model(tenant, engine, kind="multiclass", classes=list(w.classes))
    items = [
        {
            "id": p,
            "ts": stamp(at(w.ts[i])),
            "scores": {c: float(w.proba[i, k]) for k, c in enumerate(w.classes)},
        }
        for i, p in enumerate(w.pids)
    ]
    send(tenant.client, model.name, "predictions", items)
    send(
        tenant.client,
        model.name,
        "labels",
        [
            {
                "id": w.pids[i],
                "actual": w.classes[int(w.actual[i])],
                "ts": stamp(at(w.ts[i] + 7200)),
            }
            for i in np.flatnonzero(w.labelled)
        ],
    )
    start, end = START - timedelta(days=1), START + timedelta(days=12)
    for granularity, beta in (("day", 1.0), ("day", 2.0), ("week", 1.0)):
        answer = metrics(
            tenant.client,
            model.name,
            granularity=granularity,
            beta=beta,
            start=stamp(start),
            end=stamp(end),
        )
        starts = window_starts(granularity, align(start, granularity), align(end, granularity))
        assert [x["start"] for x in answer["windows"]] == [stamp(s) for s in starts]
        for window, s in zip(answer["windows"], starts, strict=True):
            span = (w.ts >= epoch(s)) & (w.ts < epoch(s + STEPS[granularity]))
            check_multiclass(window, w, span, beta)
        assert sum(x["predictions"] for x in answer["windows"]) == len(w.pids)


def test_measures_filter_binary_windows(tenant: Tenant, engine: Engine, frozen: None) -> None:
    binary = create_model(tenant, engine)
    send(tenant.client, binary.name, "predictions", predictions(20, base=START))
    answer = metrics(tenant.client, binary.name, measures="precision,recall", start=D, end=LATER)
    assert all(set(w["measures"]) == {"precision", "recall"} for w in answer["windows"])


@pytest.mark.parametrize("wanted", ["accuracy", "accuracy,fbeta_macro,recall_weighted"])
def test_measures_filter_multiclass_windows(
    tenant: Tenant, engine: Engine, frozen: None, wanted: str
) -> None:
    w = wine()
    multi = create_model(tenant, engine, kind="multiclass", classes=list(w.classes))
    r = tenant.client.get(
        f"/v1/models/{multi.name}/metrics", params={"measures": wanted, "start": D, "end": LATER}
    )
    assert r.status_code == 200, r.text  # the multiclass measure names are measures too
    for window in r.json()["windows"]:
        assert set(window["measures"]) == set(wanted.split(",")), sorted(window["measures"])


def _interval(x: int, n: int, method: str, confidence: float) -> tuple[float, float]:
    """statsmodels' Wilson and Clopper-Pearson ("beta"); Jeffreys with the boundary rule of
    Brown, Cai and DasGupta (2001): the lower end is 0 at x = 0, the upper 1 at x = n."""
    alpha = 1 - confidence
    if method == "jeffreys":
        low = 0.0 if x == 0 else float(beta_dist.ppf(alpha / 2, x + 0.5, n - x + 0.5))
        high = 1.0 if x == n else float(beta_dist.ppf(1 - alpha / 2, x + 0.5, n - x + 0.5))
        return low, high
    low, high = proportion_confint(
        x, n, alpha=alpha, method="wilson" if method == "wilson" else "beta"
    )
    return float(low), float(high)


def test_interval_and_confidence_reach_the_proportions(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine)
    ingest(tenant.client, model.name, sc, NOW)
    start, end = START, START + timedelta(days=24)
    for method in ("wilson", "clopper-pearson", "jeffreys"):
        _check_intervals(
            metrics(
                tenant.client,
                model.name,
                start=stamp(start),
                end=stamp(end),
                interval=method,
                confidence=0.9,
                measures="precision,recall",
            ),
            method,
        )


def _check_intervals(answer: dict[str, Any], method: str) -> None:
    """Precision and recall intervals of every window against the reference."""
    checked = 0
    for w in answer["windows"]:
        c = w["confusion"]
        for name, x, n in (
            ("precision", c["tp"], c["tp"] + c["fp"]),
            ("recall", c["tp"], c["tp"] + c["fn"]),
        ):
            if n == 0:
                continue
            low, high = _interval(x, n, method, 0.9)
            assert w["measures"][name]["low"] == pytest.approx(low, rel=1e-9, abs=1e-12)
            assert w["measures"][name]["high"] == pytest.approx(high, rel=1e-9, abs=1e-12)
            checked += 1
    assert checked > 20
