"""Small builders of test data: model predictions on datasets that scikit-learn ships."""

from __future__ import annotations

from functools import cache
from typing import Any

import numpy as np
from sklearn.datasets import load_breast_cancer, load_iris, load_wine
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import cross_val_predict
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from belated.stats.window import WindowStats


def _model() -> object:
    # A deliberately weak regulariser keeps the scores spread over (0, 1).
    return make_pipeline(StandardScaler(), LogisticRegression(C=0.05, max_iter=5000))


@cache
def breast_cancer_scores() -> tuple[np.ndarray, np.ndarray]:
    """(y, p): out-of-fold probabilities of a logistic model on load_breast_cancer."""
    data = load_breast_cancer()
    # In the dataset 1 is benign; take malignant (0) as the positive class, as a screen would.
    y = 1 - data.target
    p = cross_val_predict(_model(), data.data, y, cv=5, method="predict_proba")[:, 1]
    return y.astype(np.int64), p


@cache
def multiclass_predictions(name: str) -> tuple[np.ndarray, np.ndarray, int]:
    """(y_true, y_pred, K): out-of-fold predictions on load_iris or load_wine."""
    data = {"iris": load_iris, "wine": load_wine}[name]()
    pred = cross_val_predict(_model(), data.data, data.target, cv=5)
    return data.target.astype(np.int64), pred.astype(np.int64), int(data.target.max()) + 1


def confusion_matrix(y_true: np.ndarray, y_pred: np.ndarray, k: int) -> np.ndarray:
    """K x K matrix, rows actual, columns predicted, counted plainly."""
    m = np.zeros((k, k), dtype=np.int64)
    np.add.at(m, (y_true, y_pred), 1)
    return m


def window_from(
    y: np.ndarray, p: np.ndarray, threshold: float = 0.5, unlabelled: np.ndarray | None = None
) -> WindowStats:
    """WindowStats of scored rows, every row labelled unless marked in `unlabelled`."""
    actual: list[int | None] = [int(v) for v in y]
    if unlabelled is not None:
        actual = [None if u else a for a, u in zip(actual, unlabelled, strict=True)]
    return WindowStats.from_rows(p, p >= threshold, actual)


def random_rows(
    rng: np.random.Generator, n: int, prevalence: float = 0.2, labelled: float = 0.8
) -> dict[str, Any]:
    """Seeded rows with calibrated scores: p ~ Beta, actual ~ Bernoulli(p), some unlabelled."""
    a = 4.0 * prevalence / (1.0 - prevalence)
    p = rng.beta(a, 4.0, size=n)
    y = (rng.random(n) < p).astype(np.int64)
    known = rng.random(n) < labelled
    implied = ~known & (rng.random(n) < 0.1)
    actual: list[int | None] = [int(v) if k else None for v, k in zip(y, known, strict=True)]
    delays = np.where(known, rng.exponential(60.0, size=n), np.nan)
    return {
        "scores": p,
        "predicted_pos": p >= 0.4,
        "actual": actual,
        "implied": implied,
        "delays_hours": delays,
    }
