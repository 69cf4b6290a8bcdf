"""Benchmark of belated.stats: a year of daily windows, against scikit-learn on the raw rows.

Run: .venv/bin/python bench/stats.py [--repeats 7]

Data (seeded, numpy PCG64 seed 2024): 365 windows; window i has Poisson(3000) predictions.
Scores are calibrated by construction: p ~ Beta(a_i, 4) with a_i = 1 + 0.3 sin(2 pi i / 365)
(a seasonal prevalence of about 0.17 to 0.27), actual ~ Bernoulli(p); predicted positive
when p >= 0.3; 90% of rows labelled, label delays ~ LogNormal(log 48 h, 1). Our route
summarises the windows' sufficient statistics (what the rollups hold); the scikit-learn
route computes the same point measures from the raw rows of each window (it has no
intervals, so it is spared them: the comparison flatters scikit-learn).

Intervals of fbeta, mcc and balanced accuracy are memoised by content, so a repeated
summary costs little; the "cold" lines clear the memos before every run and show what a
first request pays, the posterior draws included (and, for comparison, the percentile
bootstrap of the counts with 200 resamples that the posterior replaced).
"""

from __future__ import annotations

import argparse
import statistics
import time
import warnings
from collections.abc import Callable

import numpy as np
from sklearn import metrics
from sklearn.calibration import calibration_curve

from belated.stats import bootstrap, estimates, posterior
from belated.stats.posterior import DEFAULT_DRAWS
from belated.stats.summary import summarise, summarise_many
from belated.stats.window import WindowStats

Rows = tuple[np.ndarray, np.ndarray, np.ndarray]


def make_rows(n_windows: int = 365, seed: int = 2024) -> list[Rows]:
    """Seeded raw rows per window: (scores, predicted positive, actual with -1 unlabelled)."""
    rng = np.random.default_rng(seed)
    windows = []
    for i in range(n_windows):
        n = int(rng.poisson(3000))
        a = 1.0 + 0.3 * np.sin(2 * np.pi * i / n_windows)
        p = rng.beta(a, 4.0, size=n)
        y = (rng.random(n) < p).astype(np.int64)
        y[rng.random(n) >= 0.9] = -1
        windows.append((p, p >= 0.3, y))
    return windows


def to_stats(rows: Rows, rng: np.random.Generator) -> WindowStats:
    """WindowStats of one window's rows (what the rollups would hold)."""
    p, flagged, y = rows
    actual = [None if v < 0 else int(v) for v in y.tolist()]
    delays = np.where(y >= 0, rng.lognormal(np.log(48.0), 1.0, size=y.size), np.nan)
    return WindowStats.from_rows(p, flagged, actual, None, delays)


def sklearn_measures(rows: Rows) -> dict[str, float]:
    """The same point measures through scikit-learn from raw rows."""
    p, flagged, y = rows
    labelled = y >= 0
    y_true = y[labelled]
    y_pred = flagged[labelled].astype(np.int64)
    y_prob = p[labelled]
    tn, fp, fn, tp = metrics.confusion_matrix(y_true, y_pred, labels=[0, 1]).ravel()
    prob_true, prob_pred = calibration_curve(y_true, y_prob, n_bins=10, strategy="uniform")
    counts = np.histogram(y_prob, bins=10, range=(0.0, 1.0))[0]
    counts = counts[counts > 0]
    return {
        "precision": metrics.precision_score(y_true, y_pred),
        "recall": metrics.recall_score(y_true, y_pred),
        "fbeta": metrics.fbeta_score(y_true, y_pred, beta=1.0),
        "accuracy": metrics.accuracy_score(y_true, y_pred),
        "specificity": tn / (tn + fp),
        "npv": tn / (tn + fn),
        "balanced_accuracy": metrics.balanced_accuracy_score(y_true, y_pred),
        "mcc": metrics.matthews_corrcoef(y_true, y_pred),
        "positive_rate": float(flagged.mean()),
        "prevalence": float(y_true.mean()),
        "roc_auc": metrics.roc_auc_score(y_true, y_prob),
        "average_precision": metrics.average_precision_score(y_true, y_prob),
        "brier": metrics.brier_score_loss(y_true, y_prob),
        "log_loss": metrics.log_loss(y_true, y_prob),
        "ece": float(np.dot(counts, np.abs(prob_true - prob_pred)) / counts.sum()),
    }


def timed(run: Callable[[], object]) -> tuple[float, float]:
    """(wall seconds, CPU seconds of this process) of one run."""
    wall, cpu = time.perf_counter(), time.process_time()
    run()
    return time.perf_counter() - wall, time.process_time() - cpu


def medians(run: Callable[[], object], repeats: int) -> tuple[float, float]:
    """Median wall and CPU seconds over `repeats` runs, after one warm-up run."""
    run()
    times = [timed(run) for _ in range(repeats)]
    return statistics.median(t[0] for t in times), statistics.median(t[1] for t in times)


def forget() -> None:
    """Clear the interval and prior memos, so that the next run computes everything."""
    bootstrap._MEMO.clear()
    posterior._MEMO.clear()
    estimates._EM_MEMO.clear()


def cold_medians(run: Callable[[], object], repeats: int) -> tuple[float, float]:
    """Median wall and CPU seconds over `repeats` runs, each after clearing the memos."""
    times = []
    for _ in range(repeats):
        forget()
        times.append(timed(run))
    return statistics.median(t[0] for t in times), statistics.median(t[1] for t in times)


def main() -> None:
    """Print the benchmark table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=7, help="runs of our route per round")
    parser.add_argument("--rounds", type=int, default=3, help="rounds of both routes")
    args = parser.parse_args()
    rows = make_rows()
    rng = np.random.default_rng(7)
    build_wall, _ = timed(lambda: [to_stats(r, rng) for r in rows[:1]])
    stats = [to_stats(r, rng) for r in rows]
    n_rows = sum(r[0].size for r in rows)

    def ours() -> object:
        return summarise_many(stats)

    def ours_one_by_one() -> object:
        return [summarise(s) for s in stats]

    def theirs() -> object:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return [sklearn_measures(r) for r in rows]

    # The two routes alternate, round after round, so that both see the same machine load
    # (a shared machine); each round's ratio compares neighbours in time.
    ours_runs: list[tuple[float, float]] = []
    loop_runs: list[tuple[float, float]] = []
    theirs_runs: list[tuple[float, float]] = []
    ratios_wall: list[float] = []
    ratios_cpu: list[float] = []
    for _ in range(args.rounds):
        mine = medians(ours, args.repeats)
        loop_runs.append(medians(ours_one_by_one, args.repeats))
        other = timed(theirs)
        ours_runs.append(mine)
        theirs_runs.append(other)
        ratios_wall.append(other[0] / mine[0])
        ratios_cpu.append(other[1] / mine[1])
    some = stats[:50]
    per_1k = cold_medians(lambda: summarise_many(some, resamples=1000), 3)
    per_10k = cold_medians(lambda: summarise_many(some[:10], resamples=10_000), 3)
    cold = cold_medians(ours, args.repeats)
    counts = [(s.tp, s.fp, s.fn, s.tn) for s in stats]

    def old_route() -> object:
        # Everything but the three intervals, then those by the counts' bootstrap.
        summarise_many(stats, resamples=0)
        return bootstrap.bootstrap_binary_many(counts, beta=1.0, confidence=0.95, resamples=200)

    old_cold = cold_medians(old_route, args.repeats)

    def median_of(runs: list[tuple[float, float]], i: int) -> float:
        return statistics.median(r[i] for r in runs)

    print(f"365 windows, {n_rows:,} rows; medians over {args.rounds} rounds (wall, and CPU of")
    print("this process, which a busy shared machine inflates less)")
    print(f"{'what':56s} {'wall':>11s} {'CPU':>11s}")
    lines = [
        (f"summarise_many, 365 windows, {DEFAULT_DRAWS} draws, memo warm", ours_runs, 1e3, "ms", 1),
        (f"summarise_many, 365 windows, {DEFAULT_DRAWS} draws, cold", [cold], 1e3, "ms", 1.0),
        ("  the same with the old 200-resample bootstrap, cold", [old_cold], 1e3, "ms", 1.0),
        ("  per window", ours_runs, 1e6, "us", 365.0),
        ("belated.stats: summarise one window at a time, 365 windows", loop_runs, 1e3, "ms", 1.0),
        ("belated.stats: per window, 1,000 draws, cold", [per_1k], 1e3, "ms", 50.0),
        ("belated.stats: per window, 10,000 draws, cold", [per_10k], 1e3, "ms", 10.0),
        ("scikit-learn: same point measures, raw rows, 365 windows", theirs_runs, 1e3, "ms", 1.0),
    ]
    for label, runs, scale, unit, per in lines:
        wall = median_of(runs, 0) / per * scale
        cpu = median_of(runs, 1) / per * scale
        print(f"{label:56s} {wall:8.2f} {unit} {cpu:8.2f} {unit}")
    ratio_wall = statistics.median(ratios_wall)
    ratio_cpu = statistics.median(ratios_cpu)
    print(
        f"{'ratio scikit-learn / belated.stats (median of rounds)':56s} "
        f"{ratio_wall:9.0f} x {ratio_cpu:9.0f} x"
    )
    print(
        f"{'(once, not in the above) WindowStats.from_rows, per window':56s} "
        f"{build_wall * 1e3:8.2f} ms"
    )


if __name__ == "__main__":
    main()
