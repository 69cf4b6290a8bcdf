"""Multiclass measures from a K x K matrix (belated/stats/multiclass.py)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn import metrics

from belated.stats.summary import summarise_multiclass

from .builders import confusion_matrix, multiclass_predictions


def test_scikit_learn_fbeta_docstring_example() -> None:
    # scikit-learn fbeta_score docstring: y_true = [0, 1, 2, 0, 1, 2],
    # y_pred = [0, 2, 1, 0, 0, 1], beta = 0.5 gives macro 0.238, micro 0.333, weighted 0.238.
    m = confusion_matrix(np.array([0, 1, 2, 0, 1, 2]), np.array([0, 2, 1, 0, 0, 1]), 3)
    out = summarise_multiclass(m, ["0", "1", "2"], beta=0.5)["measures"]
    assert out["fbeta_macro"]["value"] == pytest.approx(0.238, abs=5e-4)
    assert out["fbeta_micro"]["value"] == pytest.approx(0.333, abs=5e-4)
    assert out["fbeta_weighted"]["value"] == pytest.approx(0.238, abs=5e-4)


@pytest.mark.parametrize("dataset", ["iris", "wine"])
@pytest.mark.parametrize("beta", [0.5, 1.0, 2.0])
def test_averages_match_scikit_learn(dataset: str, beta: float) -> None:
    # Reference library: scikit-learn precision/recall/fbeta_score with average=macro, micro,
    # weighted, on a logistic model's predictions for load_iris and load_wine.
    y_true, y_pred, k = multiclass_predictions(dataset)
    classes = [str(c) for c in range(k)]
    out = summarise_multiclass(confusion_matrix(y_true, y_pred, k), classes, beta=beta)
    got = out["measures"]
    assert got["accuracy"]["value"] == pytest.approx(metrics.accuracy_score(y_true, y_pred))
    for average in ("macro", "micro", "weighted"):
        reference = {
            "precision": metrics.precision_score(y_true, y_pred, average=average),
            "recall": metrics.recall_score(y_true, y_pred, average=average),
            "fbeta": metrics.fbeta_score(y_true, y_pred, beta=beta, average=average),
        }
        for name, value in reference.items():
            assert got[f"{name}_{average}"]["value"] == pytest.approx(value, rel=1e-12)
    per_class = metrics.fbeta_score(y_true, y_pred, beta=beta, average=None)
    for c, value in zip(classes, per_class, strict=True):
        assert out["per_class"][c]["fbeta"]["value"] == pytest.approx(value, rel=1e-12)


def test_an_undefined_class_is_left_out_and_named() -> None:
    # Class "c" is never predicted: its precision is undefined, left out of the macro and
    # weighted precision, and named. scikit-learn would count it as 0 instead.
    m = np.array([[8, 2, 0], [1, 9, 0], [3, 2, 0]])
    out = summarise_multiclass(m, ["a", "b", "c"])
    precision_a, precision_b = 8 / 12, 9 / 13
    macro = out["measures"]["precision_macro"]
    assert macro["value"] == pytest.approx((precision_a + precision_b) / 2)
    assert macro["reason"] == "left out: c (no predicted positives)"
    weighted = out["measures"]["precision_weighted"]
    assert weighted["value"] == pytest.approx((10 * precision_a + 10 * precision_b) / 20)
    assert out["per_class"]["c"]["precision"]["reason"] == "no predicted positives"
    # Recall of "c" is defined (0): it stays in the average, and no reason is given.
    assert out["per_class"]["c"]["recall"]["value"] == 0.0
    assert "reason" not in out["measures"]["recall_macro"]
    assert out["measures"]["recall_macro"]["value"] == pytest.approx((0.8 + 0.9 + 0.0) / 3)


def test_intervals_and_json() -> None:
    y_true, y_pred, k = multiclass_predictions("wine")
    out = summarise_multiclass(confusion_matrix(y_true, y_pred, k), ["a", "b", "c"], seed=5)
    json.dumps(out, allow_nan=False)
    for name, value in out["measures"].items():
        assert value["low"] is not None and value["low"] <= value["high"], name
    again = summarise_multiclass(confusion_matrix(y_true, y_pred, k), ["a", "b", "c"], seed=5)
    assert again == out
    assert out["confusion"]["classes"] == ["a", "b", "c"]
    assert type(out["confusion"]["matrix"][0][0]) is int


def test_empty_matrix_and_bad_input() -> None:
    out = summarise_multiclass(np.zeros((2, 2), dtype=int), ["x", "y"])
    assert all(v["value"] is None for v in out["measures"].values())
    assert out["measures"]["accuracy"]["reason"] == "nothing labelled"
    with pytest.raises(ValueError):
        summarise_multiclass(np.zeros((2, 3)), ["x", "y"])
    with pytest.raises(ValueError):
        summarise_multiclass(np.array([[1, -1], [0, 2]]), ["x", "y"])
