"""Builders for the metrics tests: datasets that scikit-learn ships, scored and spread in time.

Binary: the Wisconsin breast cancer data (`sklearn.datasets.load_breast_cancer`, 569 rows),
positive class 1 = malignant. A logistic regression on three features (mean texture, mean
smoothness, mean symmetry) is trained on one half and scores the other, then the halves swap
(two-fold cross-fitting), so that every row has a score from a model that never saw it. The
few features keep the model mediocre on purpose (AUC about 0.84): windows then hold false
positives and false negatives, not only hits.

Time (seeded, numpy PCG64): prediction times uniform over SPREAD_DAYS days from START (a
Wednesday, so the first ISO week is partial), skipping OUTAGE_DAY entirely (no prediction:
an empty window inside the range). Label delays are exponential with mean MEAN_DELAY_HOURS;
a share NEVER_SHARE of outcomes is never reported. Tags: region in four values with unequal
weights, channel web or app.

`check_window` is the reference: scikit-learn's metrics on the rows of one window;
`assert_close` compares stored rollups or answers computed two ways.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from functools import lru_cache
from typing import Any

import numpy as np
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from tests.support.builders import stamp
from tests.support.sending import send

SEED = 20260902
START = datetime(2026, 9, 2, tzinfo=UTC)  # a Wednesday
SPREAD_DAYS = 24
OUTAGE_DAY = 10
MEAN_DELAY_HOURS = 72.0
NEVER_SHARE = 0.15
NOW = START + timedelta(days=30, hours=7, minutes=30)
REGIONS = ("north", "south", "east", "west")
REGION_WEIGHTS = (0.4, 0.3, 0.2, 0.1)
CHANNELS = ("web", "app")
STEPS = {"hour": timedelta(hours=1), "day": timedelta(days=1), "week": timedelta(days=7)}


def at(seconds: float) -> datetime:
    """Epoch seconds as an aware UTC datetime."""
    return datetime.fromtimestamp(float(seconds), UTC)


def epoch(dt: datetime) -> float:
    """An aware datetime as epoch seconds."""
    return dt.timestamp()


def cross_fit(x: np.ndarray, y: np.ndarray, seed: int) -> np.ndarray:
    """predict_proba of a logistic regression fitted on the other half (two folds)."""
    order = np.random.default_rng(seed).permutation(len(y))
    half = len(y) // 2
    first, second = order[:half], order[half:]
    out = np.zeros((len(y), len(np.unique(y))))
    for train, test in ((first, second), (second, first)):
        model = make_pipeline(StandardScaler(), LogisticRegression(C=0.1, max_iter=2000))
        model.fit(x[train], y[train])
        out[test] = model.predict_proba(x[test])
    return out


@dataclass(frozen=True)
class Scenario:
    """Scored rows of a binary model with prediction times, outcomes and tags."""

    pids: list[str]
    ts: np.ndarray  # epoch seconds (whole), prediction time
    score: np.ndarray  # positive-class probability
    actual: np.ndarray  # true class, 0 or 1
    label_at: np.ndarray  # epoch seconds when the outcome becomes known; NaN: never
    region: np.ndarray
    channel: np.ndarray
    threshold: float = 0.5

    @property
    def predicted(self) -> np.ndarray:
        """The service's rule: score >= threshold is positive."""
        return (self.score >= self.threshold).astype(int)

    def prediction_items(self, idx: np.ndarray | None = None) -> list[dict[str, Any]]:
        """POST bodies of the predictions (all, or the rows `idx`)."""
        rows = range(len(self.pids)) if idx is None else idx.tolist()
        return [
            {
                "id": self.pids[i],
                "ts": stamp(at(self.ts[i])),
                "score": float(self.score[i]),
                "tags": {"region": str(self.region[i]), "channel": str(self.channel[i])},
            }
            for i in rows
        ]

    def known(self, when: datetime, after: datetime | None = None) -> np.ndarray:
        """Rows whose outcome is known by `when` (and was not yet by `after`)."""
        t = epoch(when)
        mask = ~np.isnan(self.label_at) & (np.nan_to_num(self.label_at, nan=np.inf) <= t)
        if after is not None:
            mask &= self.label_at > epoch(after)
        return mask

    def label_items(
        self, mask: np.ndarray, actual: np.ndarray | None = None
    ) -> list[dict[str, Any]]:
        """POST bodies of the labels of the rows in `mask`, in outcome-time order."""
        values = self.actual if actual is None else actual
        rows = sorted(np.flatnonzero(mask).tolist(), key=lambda i: self.label_at[i])
        return [
            {"id": self.pids[i], "actual": str(int(values[i])), "ts": stamp(at(self.label_at[i]))}
            for i in rows
        ]


@lru_cache(maxsize=1)
def _breast_cancer_scores() -> tuple[np.ndarray, np.ndarray]:
    data = load_breast_cancer()
    y = 1 - data.target  # sklearn codes malignant as 0; our positive class is malignant
    return cross_fit(data.data[:, [1, 4, 8]], y, SEED)[:, 1], y


def breast_cancer(seed: int = SEED, prefix: str = "bc", never: float = NEVER_SHARE) -> Scenario:
    """The scored breast cancer rows spread over SPREAD_DAYS days with delayed outcomes;
    a share `never` of the outcomes is never reported."""
    score, y = _breast_cancer_scores()
    rng = np.random.default_rng(seed)
    n = len(y)
    offset = rng.uniform(0, (SPREAD_DAYS - 1) * 86400, n)
    offset = np.where(offset >= OUTAGE_DAY * 86400, offset + 86400, offset)  # the outage day
    ts = np.floor(epoch(START) + offset)
    delay = np.round(rng.exponential(MEAN_DELAY_HOURS * 3600, n))
    label_at = np.where(rng.random(n) < never, np.nan, ts + delay)
    region = rng.choice(np.array(REGIONS), size=n, p=REGION_WEIGHTS)
    channel = rng.choice(np.array(CHANNELS), size=n)
    pids = [f"{prefix}-{i:04d}" for i in range(n)]
    return Scenario(pids, ts, score.copy(), y.copy(), label_at, region, channel)


def metrics(client: Any, model: str, **params: Any) -> dict[str, Any]:
    """GET the metrics of a model; must be a 200."""
    r = client.get(f"/v1/models/{model}/metrics", params=params)
    assert r.status_code == 200, r.text
    return r.json()


def window_starts(granularity: str, start: datetime, end: datetime) -> list[datetime]:
    """Window starts in [start, end), both already aligned."""
    step, out, t = STEPS[granularity], [], start
    while t < end:
        out.append(t)
        t += step
    return out


def align(dt: datetime, granularity: str) -> datetime:
    """The start of the hour, UTC day or ISO week (Monday) holding `dt`."""
    h = dt.replace(minute=0, second=0, microsecond=0)
    if granularity == "hour":
        return h
    d = h.replace(hour=0)
    return d if granularity == "day" else d - timedelta(days=d.weekday())


def in_range(ts: np.ndarray, lo: datetime, hi: datetime) -> np.ndarray:
    """Rows with lo <= ts < hi."""
    return (ts >= epoch(lo)) & (ts < epoch(hi))


def ingest(client: Any, model: str, sc: Scenario, when: datetime) -> None:
    """Send every prediction, then the labels known by `when`."""
    send(client, model, "predictions", sc.prediction_items())
    send(client, model, "labels", sc.label_items(sc.known(when)))


def settled(
    n: int,
    n_labelled: int,
    end: datetime,
    now: datetime,
    min_coverage: float,
    label_delay_days: float,
) -> bool | None:
    """DESIGN.md "settled" for a model without arrival curves (these scenarios have fewer
    than 200 labels of a class, the least a curve needs): closed, and the end more than
    `label_delay_days` ago; coverage alone never settles a window. `n_labelled` and
    `min_coverage` are kept for the callers: without curves they do not count.

    None for a closed empty window, whose coverage (0/0) the design leaves open."""
    del n_labelled, min_coverage
    if end > now:
        return False
    if n == 0:
        return None
    return end + timedelta(days=label_delay_days) < now


# --- the reference: scikit-learn on the rows of a window -------------------------------------


def effective(
    sc: Scenario,
    when: datetime,
    *,
    actual: np.ndarray | None = None,
    known: np.ndarray | None = None,
    negative_after_days: float | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(labelled, y, implied) at `when`: the labels sent (default: all known by `when`),
    plus implied negatives when the model has `negative_after_days`."""
    y = (sc.actual if actual is None else actual).copy()
    known = sc.known(when) if known is None else known
    implied = np.zeros(len(y), bool)
    if negative_after_days is not None:
        implied = ~known & (sc.ts <= epoch(when - timedelta(days=negative_after_days)))
        y = np.where(implied, 0, y)
    return known | implied, y, implied


def same(measure: dict[str, Any], expected: float, rel: float = 1e-9) -> None:
    """An API measure equals the reference; NaN (undefined) must be null with a reason."""
    if np.isnan(expected):
        assert measure["value"] is None and measure.get("reason"), measure
    else:
        assert measure["value"] is not None, (measure, expected)
        assert abs(measure["value"] - expected) <= rel * max(1.0, abs(expected)), (
            measure,
            expected,
        )


def auc_tie_bound(y: np.ndarray, bins: np.ndarray) -> float:
    """Largest |AUC(bins) - AUC(raw)|: AUC is the Mann-Whitney share of correctly ordered
    positive-negative pairs, ties counting 1/2 (common practice; scikit-learn does the same).
    Binning keeps the order of pairs in different bins and scores a pair sharing a bin 1/2,
    where the raw scores give it 0, 1/2 or 1; so the error is at most half the share of
    pairs that share a bin."""
    pos = np.bincount(bins[y == 1], minlength=100).astype(float)
    neg = np.bincount(bins[y == 0], minlength=100).astype(float)
    return 0.5 * float(pos @ neg) / (pos.sum() * neg.sum())


def check_window(
    window: dict[str, Any],
    sc: Scenario,
    rows: np.ndarray,
    labelled: np.ndarray,
    y: np.ndarray,
    implied: np.ndarray,
    beta: float = 1.0,
    full: bool = True,
) -> None:
    """One binary window of the API against scikit-learn on the same rows.

    `full=False` checks counts, coverage, precision, recall and F-beta only (hourly ranges).
    """
    from sklearn import metrics as skm

    lab = rows & labelled
    yt, yp, p = y[lab], sc.predicted[lab], sc.score[lab]
    n = int(rows.sum())
    assert window["predictions"] == n
    assert window["labelled"] == int(lab.sum())
    assert window["implied_negatives"] == int((rows & implied).sum())
    if n:
        assert abs(window["coverage"] - lab.sum() / n) <= 1e-6
    if full:
        _check_bounds(window, sc, rows, labelled, y, beta)
    m = window["measures"]
    nan = float("nan")
    same(m["positive_rate"], sc.predicted[rows].mean() if n else nan)
    if not len(yt):
        assert window["confusion"] == {"tp": 0, "fp": 0, "fn": 0, "tn": 0}
        for name in (
            "precision",
            "recall",
            "fbeta",
            "accuracy",
            "brier",
            "log_loss",
            "roc_auc",
            "prevalence",
        ):
            same(m[name], nan)
        return
    tn, fp, fn, tp = skm.confusion_matrix(yt, yp, labels=[0, 1]).ravel().tolist()
    assert window["confusion"] == {"tp": tp, "fp": fp, "fn": fn, "tn": tn}
    # per class (0, 1): precision, recall, F-beta; class 0's are npv and specificity
    prec, rec, f, _ = skm.precision_recall_fscore_support(
        yt, yp, labels=[0, 1], beta=beta, zero_division=np.nan
    )
    same(m["precision"], prec[1])
    same(m["recall"], rec[1])
    same(m["fbeta"], f[1])
    if not full:
        return
    same(m["npv"], prec[0])
    same(m["specificity"], rec[0])
    same(m["accuracy"], skm.accuracy_score(yt, yp))
    same(m["prevalence"], yt.mean())
    both = 0 < yt.sum() < len(yt)
    same(m["balanced_accuracy"], skm.balanced_accuracy_score(yt, yp) if both else nan)
    margins = min(tp + fp, tn + fn, tp + fn, tn + fp) > 0
    same(m["mcc"], skm.matthews_corrcoef(yt, yp) if margins else nan)
    same(m["brier"], skm.brier_score_loss(yt, p, labels=[0, 1]))
    same(m["log_loss"], skm.log_loss(yt, p, labels=[0, 1]))
    bins = np.minimum((p * 100).astype(int), 99)
    if both:
        # on the bin indices the histogram measures are exactly scikit-learn's (ties as 1/2)
        same(m["roc_auc"], skm.roc_auc_score(yt, bins))
        same(m["average_precision"], skm.average_precision_score(yt, bins))
        gap = abs(m["roc_auc"]["value"] - skm.roc_auc_score(yt, p))
        assert gap <= auc_tie_bound(yt, bins) + 1e-12, (gap, auc_tie_bound(yt, bins))
    else:
        same(m["roc_auc"], nan)
    tens = bins // 10  # ECE's 10 bins are the 100 merged by tens
    ece = sum(abs(p[tens == j].sum() - yt[tens == j].sum()) for j in range(10)) / len(yt)
    same(m["ece"], ece)


def _check_bounds(
    window: dict[str, Any],
    sc: Scenario,
    rows: np.ndarray,
    labelled: np.ndarray,
    y: np.ndarray,
    beta: float,
) -> None:
    """Worst-case bounds (Manski 1989, cited from memory) by imputing every missing label
    both ways, then scikit-learn on all rows of the window."""
    from sklearn import metrics as skm

    pred = sc.predicted[rows]
    if labelled[rows].all():
        assert window["bounds"] is None
        return
    best = np.where(labelled[rows], y[rows], pred)  # missing labels agree with the model
    worst = np.where(labelled[rows], y[rows], 1 - pred)  # ... or all disagree
    bounds = window["bounds"]
    for side, imputed in (("low", worst), ("high", best)):
        prec, rec, f, _ = skm.precision_recall_fscore_support(
            imputed, pred, labels=[1], beta=beta, zero_division=np.nan
        )
        for name, value in (("precision", prec[0]), ("recall", rec[0]), ("fbeta", f[0])):
            same({"value": bounds[name][side], "reason": "-"}, value)


def assert_close(a: Any, b: Any, path: str = "") -> None:
    """Counts (ints, strings, None) equal; floats within 1e-9 relative (summation order)."""
    if isinstance(a, dict):
        assert isinstance(b, dict) and a.keys() == b.keys(), path
        for k in a:
            assert_close(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), path
        for i, (x, z) in enumerate(zip(a, b, strict=True)):
            assert_close(x, z, f"{path}[{i}]")
    elif isinstance(a, np.ndarray):
        if a.dtype.kind == "f":
            assert np.allclose(a, b, rtol=1e-9, atol=0), path
        else:
            assert np.array_equal(a, b), path
    elif isinstance(a, float) or isinstance(b, float):
        assert a is not None and b is not None, path
        assert abs(a - b) <= 1e-9 * max(abs(a), abs(b)), (path, a, b)
    else:
        assert a == b, path
