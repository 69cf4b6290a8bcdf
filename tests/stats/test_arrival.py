"""Arrival curves from right-truncated delays (belated/stats/arrival.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from lifelines import KaplanMeierFitter
from scipy.stats import lognorm

from belated.stats.arrival import age_reaching, cohort_arrival, fit_arrival
from belated.stats.delays import DELAY_EDGES_HOURS, N_DELAY_BINS, delay_bins

UPPER = np.asarray(DELAY_EDGES_HOURS[1:])


def cohort_histories(
    ts: np.ndarray,
    group: np.ndarray,
    delay: np.ndarray,
    now: float,
    n_groups: int,
    implied_after: float | None = None,
    implied_group: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """What the rollups hold at `now` about predictions made at `ts` (hours).

    Returns per group (a class, or a class in a score band) and hourly cohort the delay
    histogram of the labels arrived by now, the implied negatives per group and cohort, and
    each cohort's age (now minus the start of its hour). With `implied_after`, a prediction
    of group `implied_group` (its band's negative class) whose label has not come by then is
    an implied negative from that age on, and its own late label never comes; any other
    prediction unlabelled at that age is an implied negative until its label comes.
    """
    hours = np.floor(ts).astype(np.int64)
    first = int(hours.min())
    n_hours = int(math.floor(now)) - first + 1
    cohort = hours - first
    age = now - ts
    arrived = delay <= age
    implied = np.zeros((n_groups, n_hours))
    if implied_after is not None and implied_group is not None:
        never = (group == implied_group) & (delay > implied_after)
        arrived &= ~never
        waiting = (delay > implied_after) & (age >= implied_after) & ~arrived
        np.add.at(implied, (implied_group[waiting], cohort[waiting]), 1)
    hists = np.zeros((n_groups, n_hours, N_DELAY_BINS))
    np.add.at(hists, (group[arrived], cohort[arrived], delay_bins(delay[arrived])), 1)
    return hists, implied, now - (first + np.arange(n_hours))


def _truncated(
    seed: int, cohorts: int = 300, per_cohort: int = 40, every_hours: float = 3.0
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Cohorts every few hours, LogNormal(log 60 h, 0.8) delays, seen when the delay's bin
    is over by the cohort's age: (histograms, ages, seen delays at their bins' upper edges,
    the age - 1 each seen delay was truncated at)."""
    rng = np.random.default_rng(seed)
    ages = np.arange(1, cohorts + 1) * every_hours + 1.0
    hists = np.zeros((cohorts, N_DELAY_BINS))
    times: list[np.ndarray] = []
    limits: list[np.ndarray] = []
    for h in range(cohorts):
        b = delay_bins(rng.lognormal(math.log(60.0), 0.8, per_cohort))
        seen = UPPER[b] <= ages[h] - 1.0
        np.add.at(hists[h], b[seen], 1)
        times.append(UPPER[b[seen]])
        limits.append(np.full(int(seen.sum()), ages[h] - 1.0))
    return hists, ages, np.concatenate(times), np.concatenate(limits)


def test_complete_cohorts_give_kaplan_meier_without_censoring() -> None:
    # Plain KM setting: every cohort older than any delay, so nothing is truncated; F at
    # each bin edge is lifelines' KM on the binned delays (no censoring), and the Greenwood
    # variance is the binomial F (1 - F) / n (Greenwood 1926, common practice).
    rng = np.random.default_rng(2)
    delays = rng.lognormal(math.log(30.0), 1.0, 2500)
    delays = delays[delays < 2000.0]
    ages = np.full(50, 5000.0)
    hists = np.zeros((50, N_DELAY_BINS))
    np.add.at(hists, (np.arange(delays.size) % 50, delay_bins(delays)), 1)
    fit = fit_arrival(hists, ages)
    assert fit.curve is not None and fit.n_labels == delays.size and fit.reason is None
    edges = UPPER[:100]
    km = KaplanMeierFitter().fit(UPPER[delay_bins(delays)], np.ones(delays.size))
    theirs = 1.0 - km.survival_function_at_times(edges).to_numpy()
    assert np.allclose(fit.curve.at(edges), theirs, atol=1e-12)
    f = fit.curve.at(edges)
    assert np.allclose(fit.curve.variance_at(edges), f * (1 - f) / delays.size, atol=1e-12)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_truncated_delays_equal_lifelines_km_in_reverse_time(seed: int) -> None:
    # Lagakos, Barraj and De Gruttola (1988): right-truncated delays T <= c become, in
    # reverse time U = tau - T, left-truncated at tau - c, where Kaplan-Meier with delayed
    # entry applies. lifelines' KaplanMeierFitter(entry=...) on the reversed, binned delays
    # gives P(U >= tau - e) = F(e) at every bin edge e. (lifelines puts a subject in the
    # risk set only after its entry time, hence entry half an hour before the limit.)
    hists, ages, times, limits = _truncated(seed)
    fit = fit_arrival(hists, ages)
    assert fit.curve is not None
    tau = 10_000.0
    km = KaplanMeierFitter().fit(tau - times, np.ones(times.size), entry=tau - limits - 0.5)
    edges = UPPER[:90]
    theirs = km.survival_function_at_times(tau - edges - 1e-6).to_numpy()
    assert np.allclose(fit.curve.at(edges), theirs, atol=1e-12)


def test_reverse_time_estimate_recovers_the_delay_distribution_within_its_greenwood_se() -> None:
    # 200 seeded histories of 300 cohorts (ages 4 h to 901 h, 40 predictions each, delays
    # LogNormal(log 60 h, 0.8)): at 24 h, 60 h and 150 h the true F at the bin edge must be
    # inside F_hat +- 1.96 SE in about 95% of histories; asserted >= 90% (MCSE of a 95%
    # share over 200 histories is 1.5 points, so 90% is over 3 MCSE below).
    inside = []
    for seed in range(200):
        hists, ages, _, _ = _truncated(1000 + seed)
        curve = fit_arrival(hists, ages).curve
        assert curve is not None
        for edge in (24.0, 60.0, 150.0):
            truth = lognorm.cdf(edge, 0.8, scale=60.0)
            se = math.sqrt(float(curve.variance_at(edge)))
            inside.append(abs(float(curve.at(edge)) - truth) <= 1.96 * se)
    assert np.mean(inside) >= 0.90, np.mean(inside)


def test_a_history_of_hourly_cohorts_with_implied_negatives() -> None:
    # 120 days, 2,000 predictions a day, 15% positives; positives' labels LogNormal(log 72 h,
    # 1), negatives' LogNormal(log 480 h, 1), implied negative at 720 h. Both curves follow
    # the truth within 4 SE at ages the history has seen in full, and the negative curve
    # jumps to 1 at 720 h exactly.
    rng = np.random.default_rng(11)
    n = 120 * 2000
    ts = rng.uniform(0.0, 120 * 24.0, n)
    cls = (rng.random(n) < 0.15).astype(np.int64)
    delay = rng.lognormal(np.log(np.where(cls == 1, 72.0, 480.0)), 1.0)
    hists, implied, ages = cohort_histories(
        ts, cls, delay, 120 * 24.0, 2, 720.0, np.zeros(n, dtype=np.int64)
    )
    pos = fit_arrival(hists[1], ages).curve
    neg = fit_arrival(hists[0], ages, implied=implied[0], implied_after_hours=720.0).curve
    assert pos is not None and neg is not None
    for age in (24.0, 72.0, 200.0, 480.0, 700.0):
        for curve, median in ((pos, 72.0), (neg, 480.0)):
            truth = lognorm.cdf(age, 1.0, scale=median)
            se = math.sqrt(float(curve.variance_at(age)))
            assert abs(float(curve.at(age)) - truth) <= 4 * se + 2e-3, (age, median)
    assert float(neg.at(719.99)) < 0.7 and float(neg.at(720.0)) == pytest.approx(1.0)
    assert age_reaching(neg, 0.9) == pytest.approx(720.0)
    points = neg.points()  # the delays endpoint's [{"age_hours", "arrived"}, ...]
    assert points[0] == {"age_hours": 0.0, "arrived": 0.0} and points[-1]["arrived"] == 1.0
    assert all(a["arrived"] <= b["arrived"] for a, b in zip(points, points[1:], strict=False))
    assert {"age_hours": 720.0, "arrived": 1.0} in points
    at, var = cohort_arrival(pos, np.array([0.5, 73.0]))
    assert at[0] == 0.0 and at[1] == pytest.approx(float(pos.at(72.5)))
    assert var.shape == (2,)


def test_a_class_with_too_few_labels_has_no_curve() -> None:
    hists = np.zeros((10, N_DELAY_BINS))
    hists[:, 5] = 19
    ages = np.full(10, 500.0)
    fit = fit_arrival(hists, ages)
    assert fit.curve is None and fit.n_labels == 190
    assert fit.reason == "fewer than 200 labels in the history used"
    # labels of cohorts too young to have seen their bin in full are not used
    hists[:, 5] = 25
    assert fit_arrival(hists, np.full(10, 6.5)).n_labels == 0
    assert fit_arrival(hists, ages).curve is not None


def test_age_reaching_inverts_the_curve() -> None:
    hists, ages, _, _ = _truncated(4)
    curve = fit_arrival(hists, ages).curve
    assert curve is not None
    for share in (0.1, 0.5, 0.9):
        age = age_reaching(curve, share)
        assert age is not None and float(curve.at(age)) == pytest.approx(share)
    assert age_reaching(curve, 1.0) is not None
    with pytest.raises(ValueError):
        age_reaching(curve, 1.5)
