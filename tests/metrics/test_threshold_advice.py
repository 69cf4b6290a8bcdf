"""GET /thresholds: advice from settled days by default, tag filters, refusals, withheld advice.

Data (invented, seeded numpy, SEED): a furniture shop's returns model, PER_DAY orders a day
for DAYS days before NOW's day, scores Beta(2, 8) rounded to thousandths plus 0.0005 (off the
k/100 edges), each order returned (the positive class) with its score as the probability.
Returns come back 1 + Exponential(mean 3) days after the order (capped at 30); kept orders
are confirmed 14 to 21 days after it (uniform); 3% of outcomes never come; only outcomes
learnt by NOW are sent. So a young day's labels are mostly returns: a biased sample, while a
day that ended more than 19 days ago (the label delay) is settled.

References: which days are settled comes from `tests.support.datasets.settled`, the rule of
DESIGN.md written out apart from the service; the measures at every threshold k/100 and the
best F-beta come from scikit-learn's `precision_recall_fscore_support` on the rows the
answer claims to use, with "score >= k/100" as the decision.
"""

from __future__ import annotations

import html
import math
import re
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from sklearn.metrics import confusion_matrix, precision_recall_fscore_support
from sqlalchemy import Engine

from belated.clock import clock
from tests.conftest import Tenant
from tests.support import count, create_model, send, stamp, stored_rollups
from tests.support.datasets import settled

SEED = 20261202
NOW = datetime(2026, 11, 20, 9, 30, tzinfo=UTC)
TODAY = NOW.replace(hour=0, minute=0)
DAYS, PER_DAY = 40, 120
FIRST_DAY = TODAY - timedelta(days=DAYS)
# a day is settled once it ended 19 days ago; a younger day (kept orders confirmed after 14
# to 21 days) has at most ~86% of its kept orders in, so its negatives' arrival curve keeps
# it unsettled whatever its coverage: the age rule alone decides here
LABEL_DELAY_DAYS, MIN_COVERAGE = 19, 0.9
CHANNELS, REGIONS = ("web", "app"), ("north", "south", "east", "west")
DAY_S = 86400.0


@dataclass(frozen=True)
class Orders:
    """Scored orders with their outcomes, outcome times (NaN: not known by NOW) and tags."""

    ts: np.ndarray  # epoch seconds
    score: np.ndarray
    actual: np.ndarray
    known_at: np.ndarray
    channel: np.ndarray
    region: np.ndarray

    @property
    def known(self) -> np.ndarray:
        return ~np.isnan(self.known_at)

    def predictions(self) -> list[dict[str, Any]]:
        return [
            {
                "id": f"o-{i}",
                "ts": stamp(datetime.fromtimestamp(float(t), UTC)),
                "score": float(s),
                "tags": {"channel": str(c), "region": str(r)},
            }
            for i, (t, s, c, r) in enumerate(
                zip(self.ts, self.score, self.channel, self.region, strict=True)
            )
        ]

    def labels(self) -> list[dict[str, Any]]:
        rows = sorted(np.flatnonzero(self.known).tolist(), key=lambda i: self.known_at[i])
        return [
            {
                "id": f"o-{i}",
                "actual": str(int(self.actual[i])),
                "ts": stamp(datetime.fromtimestamp(float(self.known_at[i]), UTC)),
            }
            for i in rows
        ]


def shop_orders(per_day: int = PER_DAY, seed: int = SEED) -> Orders:
    """The scenario of the module docstring."""
    rng = np.random.default_rng(seed)
    n = DAYS * per_day
    day = np.repeat(np.arange(DAYS), per_day)
    ts = np.floor(FIRST_DAY.timestamp() + day * DAY_S + rng.uniform(0, DAY_S, n))
    score = np.minimum(np.round(rng.beta(2, 8, n), 3), 0.998) + 0.0005
    actual = (rng.random(n) < score).astype(int)
    back = np.minimum(1 + rng.exponential(3.0, n), 30.0)
    kept = rng.uniform(14.0, 21.0, n)
    at = ts + np.round(np.where(actual == 1, back, kept) * DAY_S)
    never = rng.random(n) < 0.03
    known_at = np.where(never | (at > NOW.timestamp()), np.nan, at)
    channel = rng.choice(np.array(CHANNELS), n)
    region = rng.choice(np.array(REGIONS), n, p=(0.4, 0.3, 0.2, 0.1))
    return Orders(ts, score, actual, known_at, channel, region)


def send_orders(tenant: Tenant, engine: Engine, orders: Orders) -> str:
    clock.set(NOW)
    model = create_model(
        tenant, engine, label_delay_days=LABEL_DELAY_DAYS, min_coverage=MIN_COVERAGE
    )
    send(tenant.client, model.name, "predictions", orders.predictions())
    send(tenant.client, model.name, "labels", orders.labels())
    return model.name


def thresholds(tenant: Tenant, model: str, **params: Any) -> dict[str, Any]:
    r = tenant.client.get(f"/v1/models/{model}/thresholds", params=params)
    assert r.status_code == 200, r.text
    return dict(r.json())


@dataclass(frozen=True)
class Expected:
    """What the answer must say, worked out on the orders alone."""

    used: np.ndarray  # the labelled rows the advice must be built on
    unsettled_labelled: int
    settled_days: int
    unsettled_days: int


def expected(
    orders: Orders, rows: np.ndarray, start: datetime, end: datetime, settled_only: bool
) -> Expected:
    """Days of [start, end) settled by `settled` on each whole day's rows of `rows` (a
    segment by its own counts); the labelled rows of the range, of settled days only when
    `settled_only`."""
    first = start.replace(hour=0)
    in_range = rows & (orders.ts >= start.timestamp()) & (orders.ts < end.timestamp())
    used = np.zeros(len(orders.ts), bool)
    unsettled_labelled, days_ok, days_not = 0, 0, 0
    day = first
    while day < end:
        lo, hi = day.timestamp(), (day + timedelta(days=1)).timestamp()
        whole = rows & (orders.ts >= lo) & (orders.ts < hi)
        n, k = int(whole.sum()), int((whole & orders.known).sum())
        ok = settled(n, k, day + timedelta(days=1), NOW, MIN_COVERAGE, LABEL_DELAY_DAYS)
        ok = ok is not False  # a closed empty day: settled, as the service says
        if n:  # the answer counts the days with predictions
            days_ok += ok
            days_not += not ok
        here = in_range & (orders.ts >= lo) & (orders.ts < hi) & orders.known
        if not ok:
            unsettled_labelled += int(here.sum())
        if ok or not settled_only:
            used |= here
        day += timedelta(days=1)
    return Expected(used, unsettled_labelled, days_ok, days_not)


def check_against_sklearn(answer: dict[str, Any], y: np.ndarray, score: np.ndarray) -> None:
    """Every sweep row and the best F1 against scikit-learn's precision_recall_fscore_support
    and confusion_matrix on the labelled rows the answer must use (outcomes `y`)."""
    bins = np.floor(score * 100).astype(int)
    assert answer["labelled"] == len(y) > 0
    assert answer["labelled_positives"] == int(y.sum())
    assert answer["labelled_negatives"] == int((1 - y).sum())
    rows = answer["sweep"]
    assert [r["threshold"] for r in rows] == [k / 100 for k in range(100)]
    f1 = []
    for k, row in enumerate(rows):
        called = (bins >= k).astype(int)
        tn, fp, fn, tp = confusion_matrix(y, called, labels=[0, 1]).ravel()
        assert (row["tp"], row["fp"], row["fn"], row["tn"]) == (tp, fp, fn, tn), k
        prec, rec, f, _ = precision_recall_fscore_support(
            y, called, labels=[1], zero_division=np.nan
        )
        for name, ref in (("precision", prec[0]), ("recall", rec[0]), ("fbeta", f[0])):
            got = row[name]
            assert (got is None and math.isnan(ref)) or got == pytest.approx(ref, abs=1e-12)
        f1.append(-1.0 if math.isnan(f[0]) else f[0])
    if answer["labelled_positives"] >= 100:
        assert answer["advice_reason"] is None
        assert answer["best_fbeta"]["threshold"] == int(np.argmax(f1)) / 100  # lowest of ties
    else:
        assert answer["best_fbeta"] is None and answer["advice_reason"]


def test_default_range_takes_settled_days_only(tenant: Tenant, engine: Engine) -> None:
    orders = shop_orders()
    model = send_orders(tenant, engine, orders)
    everyone = np.ones(len(orders.ts), bool)
    start, end = TODAY - timedelta(days=29), TODAY + timedelta(days=1)
    want = expected(orders, everyone, start, end, settled_only=True)
    answer = thresholds(tenant, model, precision_target=0.5)
    assert answer["range"] == {
        "start": stamp(start),
        "end": stamp(end),
        "settled_only": True,
        "settled_days": want.settled_days,
        "unsettled_days": want.unsettled_days,
    }
    # both kinds of day are in the range: the three-week-old days settle by coverage
    assert 5 <= want.settled_days <= 12 and want.unsettled_days >= 17
    assert answer["unsettled_labelled"] == want.unsettled_labelled > 0
    check_against_sklearn(answer, orders.actual[want.used], orders.score[want.used])
    assert answer["tags"] == {} and answer["advice_reason"] is None

    # the young days' labels are a biased sample: their positive share is far above the
    # settled days' share, which is near the scores' mean (calibrated scores)
    in_range = (orders.ts >= start.timestamp()) & (orders.ts < end.timestamp())
    young = in_range & orders.known & ~want.used
    settled_share = orders.actual[want.used].mean()
    assert orders.actual[young].mean() > 2 * settled_share
    assert abs(settled_share - orders.score[want.used].mean()) < 0.05

    # the same 30 days given explicitly: every label is used, and the precision target is
    # met at a lower threshold there, one the settled days say misses the target
    given = thresholds(tenant, model, start=stamp(start), end=stamp(end), precision_target=0.5)
    whole = expected(orders, everyone, start, end, settled_only=False)
    assert given["range"]["settled_only"] is False
    assert given["unsettled_labelled"] == want.unsettled_labelled
    check_against_sklearn(given, orders.actual[whole.used], orders.score[whole.used])
    biased = given["for_precision"]["threshold"]
    assert biased < answer["for_precision"]["threshold"]
    at_biased = answer["sweep"][round(biased * 100)]["precision"]
    assert at_biased < 0.5

    # the dashboard names the range and the counts of the advice it shows
    page = advice_text(tenant, model)
    assert "settled days of the last 30 days" in page
    assert f"with predictions {answer['range']['settled_days']} settled" in page
    assert f"{answer['labelled']:,} labelled predictions" in page
    assert f"{answer['labelled_positives']:,} positive" in page
    assert f"Left out: {answer['unsettled_labelled']:,} labelled predictions" in page
    chosen = advice_text(tenant, model, start=start.date().isoformat())
    assert "range you chose" in chosen and f"{given['labelled']:,} labelled" in chosen
    assert f"{given['unsettled_labelled']} of these labelled predictions" in chosen


@pytest.mark.parametrize(
    "tags",
    [{"channel": "web"}, {"region": "south"}, {"channel": "app", "region": "north"}],
    ids=["one-tag-rollups", "another-tag", "two-tags-raw-rows"],
)
def test_tag_filters_sweep_equals_sklearn_on_the_filtered_rows(
    tenant: Tenant, engine: Engine, tags: dict[str, str]
) -> None:
    orders = shop_orders()
    model = send_orders(tenant, engine, orders)
    rows = np.ones(len(orders.ts), bool)
    for key, value in tags.items():
        rows &= getattr(orders, key) == value
    query = {f"tag.{k}": v for k, v in tags.items()}
    # the whole history given explicitly, and the default range (each segment settles by
    # its own counts)
    start, end = FIRST_DAY, TODAY + timedelta(days=1)
    given = thresholds(tenant, model, start=stamp(start), end=stamp(end), **query)
    assert given["tags"] == tags
    want = expected(orders, rows, start, end, settled_only=False)
    assert given["unsettled_labelled"] == want.unsettled_labelled
    check_against_sklearn(given, orders.actual[want.used], orders.score[want.used])
    default = thresholds(tenant, model, **query)
    want = expected(orders, rows, TODAY - timedelta(days=29), end, settled_only=True)
    assert default["range"]["settled_days"] == want.settled_days
    assert default["unsettled_labelled"] == want.unsettled_labelled
    check_against_sklearn(default, orders.actual[want.used], orders.score[want.used])


@pytest.mark.parametrize(
    ("params", "field", "words"),
    [
        ({"tag.colour": "oak"}, "tag.colour", "'colour'"),
        ({"tag.chanel": "web"}, "tag.chanel", "closest known: channel"),
        ({"tag.channel": "webb"}, "tag.channel", "closest known: web"),
        ({"tag.channel": "web", "tag.region": "middle"}, "tag.region", "'middle'"),
        ({"segment": "channel:web"}, "segment", "tag.<key>=<value>"),
        ({"tag.": "web"}, "tag.", "1-64"),
    ],
)
def test_an_unknown_tag_is_a_422_naming_it_and_nothing_is_stored(
    tenant: Tenant, engine: Engine, params: dict[str, str], field: str, words: str
) -> None:
    clock.set(NOW)
    model = create_model(tenant, engine)
    items = [
        {
            "id": f"o-{i}",
            "ts": stamp(NOW - timedelta(hours=3, minutes=i)),
            "score": 0.3,
            "tags": {"channel": CHANNELS[i % 2], "region": REGIONS[i % 4]},
        }
        for i in range(8)
    ]
    send(tenant.client, model.name, "predictions", items)
    pending = count(engine, "dirty_buckets", model.id)
    assert pending > 0 and stored_rollups(engine, model.id) == {}
    r = tenant.client.get(f"/v1/models/{model.name}/thresholds", params=params)
    assert r.status_code == 422, r.text
    body = r.json()
    assert body["errors"][0]["field"] == field
    assert words in body["detail"], body["detail"]
    # a refused read leaves the rollups as they were: the refresh it would run is not kept
    assert stored_rollups(engine, model.id) == {}
    assert count(engine, "dirty_buckets", model.id) == pending
    # the same key twice
    r = tenant.client.get(f"/v1/models/{model.name}/thresholds?tag.channel=web&tag.channel=app")
    assert r.status_code == 422 and "twice" in r.json()["detail"]
    # a known key and value is answered (and refreshes the rollups)
    ok = thresholds(tenant, model.name, **{"tag.channel": "web"})
    assert ok["tags"] == {"channel": "web"}
    assert stored_rollups(engine, model.id) != {}


def advice_text(tenant: Tenant, model: str, **params: str) -> str:
    """The words of the dashboard's threshold section, tags stripped, spaces collapsed."""
    r = tenant.client.get(f"/models/{model}", params=params, headers=tenant.headers("read"))
    assert r.status_code == 200, r.text
    found = re.search(r"<h2>Choosing a threshold</h2>(.*?)</section>", r.text, re.S)
    assert found, "no threshold section"
    side = found.group(1).split('<div class="chartbox">')[0]
    return " ".join(html.unescape(re.sub(r"<[^>]+>", " ", side)).split())


def test_advice_needs_100_labelled_positives(tenant: Tenant, engine: Engine) -> None:
    """99 labelled positives: no advice and the reason, the sweep still there (equal to
    scikit-learn's counts); the hundredth positive brings the advice."""
    clock.set(NOW)
    model = create_model(tenant, engine, label_delay_days=1)  # two days old is settled
    t0 = NOW - timedelta(days=2)
    n = 400
    scores = (np.arange(n) % 97) / 97 * 0.99 + 0.0005
    preds = [
        {"id": f"o-{i}", "ts": stamp(t0 + timedelta(minutes=i)), "score": float(scores[i])}
        for i in range(n)
    ]
    send(tenant.client, model.name, "predictions", preds)
    actual = np.zeros(n, int)
    actual[np.argsort(-scores, kind="stable")[:100]] = 1  # the 100 highest scores are returns
    last = int(np.flatnonzero(actual)[-1])
    first_labels = [i for i in range(n) if i != last]
    send(
        tenant.client,
        model.name,
        "labels",
        [{"id": f"o-{i}", "actual": str(actual[i])} for i in first_labels],
    )
    window = {"start": stamp(t0), "end": stamp(t0 + timedelta(days=1)), "precision_target": 0.8}
    answer = thresholds(tenant, model.name, recall_target=0.5, **window)
    assert answer["labelled_positives"] == 99 and answer["labelled_negatives"] == n - 100
    assert answer["best_fbeta"] is None
    assert answer["for_precision"] is None and answer["for_recall"] is None
    assert answer["advice_reason"] == (
        "only 99 labelled positives in the range; advice needs at least 100"
    )
    check_against_sklearn(answer, actual[first_labels], scores[first_labels])
    # the default range: the day ended more than the one-day label delay ago, so settled
    default = thresholds(tenant, model.name)
    assert default["range"]["settled_only"] and default["range"]["settled_days"] == 1
    assert default["labelled_positives"] == 99
    assert default["unsettled_labelled"] == 0
    assert default["advice_reason"] == (
        "only 99 labelled positives in the settled days of the range; advice needs at least 100"
    )
    page = advice_text(tenant, model.name)
    assert (
        "No threshold advice: only 99 labelled positives in the settled days of the range;"
        " advice needs at least 100." in page
    )
    assert "best F1 at" not in page
    send(tenant.client, model.name, "labels", [{"id": f"o-{last}", "actual": "1"}])
    answer = thresholds(tenant, model.name, recall_target=0.5, **window)
    assert answer["labelled_positives"] == 100 and answer["advice_reason"] is None
    assert answer["best_fbeta"] is not None
    assert answer["for_precision"] is not None and answer["for_recall"] is not None
    page = advice_text(tenant, model.name)
    assert "No threshold advice" not in page and "best F1 at" in page
