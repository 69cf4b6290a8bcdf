"""Answers kept by content: a repeat gives the same answer, a changed window a new one."""

from __future__ import annotations

import numpy as np

from belated.stats import bootstrap, estimates
from belated.stats.memo import Memo


def test_bootstrap_from_the_memo_equals_a_fresh_computation() -> None:
    counts = [(30, 5, 8, 200), (0, 0, 0, 0), (12, 40, 3, 90)]
    first = bootstrap.bootstrap_binary_many(counts, beta=1.0, confidence=0.95)
    again = bootstrap.bootstrap_binary_many(counts, beta=1.0, confidence=0.95)
    bootstrap._MEMO.clear()
    fresh = bootstrap.bootstrap_binary_many(counts, beta=1.0, confidence=0.95)
    assert first == again == fresh
    # one more positive in the first window: a different key, a different stream
    moved = bootstrap.bootstrap_binary_many([(31, 5, 8, 200)], beta=1.0, confidence=0.95)
    assert moved[0] != first[0]
    # options are part of the key
    wider = bootstrap.bootstrap_binary_many(counts[:1], beta=1.0, confidence=0.99)
    assert wider[0]["fbeta"] != first[0]["fbeta"]


def test_em_from_the_memo_equals_a_fresh_computation() -> None:
    # seeded simulated windows: scores Beta(2, 5) in 100 bins (invented data)
    rng = np.random.default_rng(3)
    hists, sums = [], []
    for _ in range(4):
        p = rng.beta(2.0, 5.0, 5_000)
        b = np.minimum((p * 100).astype(int), 99)
        hists.append(np.bincount(b, minlength=100).astype(np.float64))
        sums.append(np.bincount(b, weights=p, minlength=100))
    priors = np.array([0.2, 0.3, 0.4, 0.3])
    first = estimates.em_prior_many(np.array(hists), np.array(sums), priors)
    estimates._EM_MEMO.clear()
    fresh = estimates.em_prior_many(np.array(hists), np.array(sums), priors)
    assert first == fresh
    hists[0][10] += 1
    sums[0][10] += 0.105
    assert estimates.em_prior_many(np.array(hists), np.array(sums), priors)[0] != first[0]


def test_the_memo_keeps_at_most_its_size() -> None:
    memo = Memo(3)
    for i in range(5):
        memo.put(i, i * i)
    assert memo.get(0) == (False, None) and memo.get(4) == (True, 16)
    memo.get(2)  # used: survives the next insertion, 3 goes
    memo.put(9, 81)
    assert memo.get(2)[0] and not memo.get(3)[0]
