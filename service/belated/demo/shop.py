"""The demo scenario: an online furniture shop predicting, for each order, a return.

Orders come through the channels web, app and phone from four regions. Each order has a
true return probability q: 85% of orders are ordinary (q from Beta(1, 30), about 3%) and 15%
are risky (q from Beta(6, 4), about 60%). The model's score is q blurred on the logit scale
(normal noise, sd 0.5), so it looks calibrated; the decision threshold is 0.3.

The outcome is known 1 to 30 days after the order: returns mostly in the first week
(1 + Gamma(1.5, 3) days, capped at 30); kept orders are confirmed when the 14-day return
window and the refund grace have passed (14 to 21 days); 3% of orders never get an outcome.

On day 60 a new sofa supplier starts delivering in the north: 40% of northern orders from
then on are its sofas. They come back often (q from Beta(4, 6), about 40%), and the model,
which has never seen the supplier, scores them on an unrelated signal: 40% of them score
U(0.35, 0.95), the rest look ordinary. The predicted positive rate in the north jumps the
same day; recall and precision there fall once the outcomes are in.

The story runs on a fixed calendar: day 0 is a Monday of the story (weekends are days 5 and 6
of each story week), and the whole calendar is shifted by whole days so that it ends at
`end`. Only the timestamps depend on `end`; every order, score, tag and outcome comes from the
seed alone.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import numpy as np

CHANNELS = ("web", "app", "phone")
REGIONS = ("north", "south", "east", "west")
CHANGE_DAY = 60


@dataclass
class Order:
    """One generated order with its (future) outcome."""

    pid: str
    ts: datetime
    score: float
    channel: str
    region: str
    returned: bool
    outcome_at: datetime | None


def _logit(p: np.ndarray) -> np.ndarray:
    p = np.clip(p, 1e-6, 1 - 1e-6)
    out: np.ndarray = np.log(p / (1 - p))
    return out


def _expit(x: np.ndarray) -> np.ndarray:
    out: np.ndarray = 1.0 / (1.0 + np.exp(-x))
    return out


def orders(*, days: int, seed: int, end: datetime, per_day: int = 1500) -> Iterator[Order]:
    """Every order of the scenario, day by day, ending at `end`."""
    rng = np.random.default_rng(seed)
    start = end - timedelta(days=days)
    for day in range(days):
        # the story's own weekdays, not the calendar's, so that the seed alone sets the counts
        n = int(rng.poisson(per_day * (1.15 if day % 7 >= 5 else 1.0)))
        region = rng.choice(REGIONS, size=n, p=[0.3, 0.25, 0.25, 0.2])
        channel = rng.choice(CHANNELS, size=n, p=[0.55, 0.35, 0.10])
        risky = rng.random(n) < 0.15
        q = np.where(risky, rng.beta(6.0, 4.0, size=n), rng.beta(1.0, 30.0, size=n))
        score = _expit(_logit(q) + rng.normal(0, 0.5, size=n))
        if day >= CHANGE_DAY:
            sofa = (region == "north") & (rng.random(n) < 0.4)
            q = np.where(sofa, rng.beta(4.0, 6.0, size=n), q)
            flagged = rng.random(n) < 0.4
            unrelated = np.where(
                flagged,
                rng.uniform(0.35, 0.95, size=n),
                _expit(_logit(rng.beta(1.0, 30.0, size=n)) + rng.normal(0, 0.5, size=n)),
            )
            score = np.where(sofa, unrelated, score)
        returned = rng.random(n) < q
        seconds = np.sort(rng.integers(0, 86_400, size=n))
        never = rng.random(n) < 0.03
        ret_delay = np.minimum(30.0, 1.0 + rng.gamma(1.5, 3.0, size=n))
        kept_delay = rng.uniform(14.0, 21.0, size=n)
        for i in range(n):
            ts = start + timedelta(days=day, seconds=int(seconds[i]))
            delay = ret_delay[i] if returned[i] else kept_delay[i]
            outcome = None if never[i] else ts + timedelta(days=float(delay))
            yield Order(
                f"ord-{day:03d}-{i:05d}",
                ts,
                float(score[i]),
                str(channel[i]),
                str(region[i]),
                bool(returned[i]),
                outcome,
            )


def prediction(o: Order) -> dict[str, Any]:
    """The prediction the shop's system posts when the order is placed."""
    return {
        "id": o.pid,
        "ts": o.ts.isoformat(),
        "score": round(o.score, 6),
        "tags": {"channel": o.channel, "region": o.region},
    }


def label(o: Order) -> dict[str, Any]:
    """The outcome the returns feed posts later."""
    assert o.outcome_at is not None
    return {"id": o.pid, "actual": int(o.returned), "ts": o.outcome_at.isoformat()}
