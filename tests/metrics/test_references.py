"""The calibration error and prevalence of the trailing settled windows, against raw rows.

ECE convention (common practice; see belated.stats.calibration): 10 equal-width bins of the
score, sum over bins of |sum of scores - number of positives| / N, over the labelled rows
of the trailing CALIBRATION_WINDOWS settled windows that hold labels. Simulated windows
(seeded numpy): scores Beta(2, 5), outcomes Bernoulli(score) (invented data).
"""

from __future__ import annotations

import numpy as np

from belated.metrics.windows import CALIBRATION_WINDOWS, _references
from belated.store.totals import Totals


def _window(rng: np.random.Generator, n: int) -> tuple[Totals, np.ndarray, np.ndarray]:
    p = rng.beta(2.0, 5.0, n)
    y = rng.random(n) < p
    totals = Totals.of({"n_labelled": n})
    bins = np.minimum((p * 100).astype(int), 99)
    for cls, mask in (("pos", y), ("neg", ~y)):
        totals.score_counts(cls)[:] = np.bincount(bins[mask], minlength=100)
        totals.score_sums(cls)[:] = np.bincount(bins[mask], weights=p[mask], minlength=100)
    return totals, p, y


def test_trailing_references_equal_a_computation_on_raw_rows() -> None:
    rng = np.random.default_rng(12)
    sizes = [int(rng.integers(0, 300)) for _ in range(40)]
    windows = [_window(rng, n) for n in sizes]
    settled = [bool(rng.random() < 0.8) for _ in windows]
    got = _references([w[0] for w in windows], settled)
    picked: list[int] = []
    for i, (acc, _, _) in enumerate(windows):
        if not picked:
            assert got[i] == (None, None)
        else:
            p = np.concatenate([windows[j][1] for j in picked])
            y = np.concatenate([windows[j][2] for j in picked])
            b = np.minimum((p * 10).astype(int), 9)
            gaps = sum(abs(p[b == k].sum() - y[b == k].sum()) for k in range(10))
            ece, prior = got[i]
            assert ece is not None and abs(ece - gaps / len(p)) < 1e-12
            assert prior is not None and abs(prior - y.mean()) < 1e-12
        if settled[i] and acc["n_labelled"]:
            picked = (picked + [i])[-CALIBRATION_WINDOWS:]
