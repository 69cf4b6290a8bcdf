"""Seeded bootstrap of confusion counts, vectorised over resamples with numpy.

The counts of a window are resampled as one multinomial draw per resample (n fixed, cell
probabilities = observed shares), which is the ordinary row bootstrap of the labelled
predictions without touching the rows. The generator is seeded from the counts and the
caller's seed, so the same data always gives the same interval, whatever ran before.
Intervals are percentile intervals over the resamples where the measure is defined; a
bootstrap interval need not contain the point value.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from belated.stats.memo import Memo
from belated.stats.values import Value

DEFAULT_RESAMPLES = 200
MAX_RESAMPLES = 10_000

BOOTSTRAPPED_BINARY: tuple[str, ...] = ("fbeta", "mcc", "balanced_accuracy")

Interval = tuple[float, float] | None


def check_resamples(resamples: int) -> int:
    """The resample count; ValueError unless it is an integer in [0, 10,000] (0: no interval)."""
    if isinstance(resamples, bool) or not isinstance(resamples, int | np.integer):
        raise ValueError("resamples must be an integer")
    if not 0 <= resamples <= MAX_RESAMPLES:
        raise ValueError(f"resamples must lie in [0, {MAX_RESAMPLES}], got {resamples}")
    return int(resamples)


def generator_for(counts: Sequence[int] | np.ndarray, seed: int) -> np.random.Generator:
    """A generator seeded by the caller's seed and the counts (same data, same stream)."""
    if seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed}")
    return np.random.default_rng([int(seed), *(int(c) for c in counts)])


def resample(
    counts: Sequence[int] | np.ndarray, resamples: int, rng: np.random.Generator
) -> np.ndarray:
    """`resamples` multinomial redraws of `counts` as a float array (resamples, len(counts))."""
    counts_arr = np.asarray(counts, dtype=np.int64)
    n = int(counts_arr.sum())
    draws = rng.multinomial(n, counts_arr / n, size=resamples)
    return draws.astype(np.float64)


def percentile_interval(samples: np.ndarray, confidence: float) -> Interval:
    """Percentile interval of the finite samples (numpy's 'linear' quantile), None if none."""
    return percentile_intervals(samples[np.newaxis, :], confidence)[0]


def percentile_intervals(samples: np.ndarray, confidence: float) -> list[Interval]:
    """`percentile_interval` of each row of a 2-D array, with one sort for all rows."""
    # NaN sorts last, so the first `m` entries of a sorted row are its finite samples.
    ordered = np.sort(np.where(np.isinf(samples), np.nan, samples), axis=1)
    finite = (ordered.shape[1] - np.isnan(ordered).sum(axis=1)).tolist()
    tail = (1.0 - confidence) / 2.0
    # Both ends of every row in one gather: positions, then the values either side of each.
    rows: list[int] = []
    below: list[int] = []
    weights: list[float] = []
    for row, m in enumerate(finite):
        for q in (tail, 1.0 - tail):
            position = q * (m - 1) if m else 0.0
            rows.append(row)
            below.append(int(position))
            weights.append(position - int(position))
    lower_index = np.array(below)
    upper_index = np.minimum(lower_index + 1, ordered.shape[1] - 1)
    lower = ordered[rows, lower_index].tolist()
    upper = ordered[rows, upper_index].tolist()
    ends = [
        lo if w == 0.0 else lo * (1.0 - w) + hi * w
        for lo, hi, w in zip(lower, upper, weights, strict=True)
    ]
    return [None if m == 0 else (ends[2 * i], ends[2 * i + 1]) for i, m in enumerate(finite)]


def binary_arrays(
    tp: np.ndarray, fp: np.ndarray, fn: np.ndarray, tn: np.ndarray, beta: float
) -> dict[str, np.ndarray]:
    """F-beta, MCC and balanced accuracy for arrays of counts; NaN where undefined."""
    b2 = beta * beta
    predicted_pos, actual_pos = tp + fp, tp + fn
    predicted_neg, actual_neg = tn + fn, tn + fp
    with np.errstate(divide="ignore", invalid="ignore"):
        # (1 + b2) TP + b2 FN + FP regrouped as b2 (TP + FN) + (TP + FP): fewer passes.
        fbeta = (1.0 + b2) * tp / (b2 * actual_pos + predicted_pos)
        mcc = (tp * tn - fp * fn) / np.sqrt(predicted_pos * predicted_neg * actual_pos * actual_neg)
        balanced = 0.5 * (tp / actual_pos + tn / actual_neg)
    # A zero margin makes MCC 0/0 = NaN (undefined), the same as the point rule.
    return {"fbeta": fbeta, "mcc": mcc, "balanced_accuracy": balanced}


def bootstrap_binary_many(
    counts: Sequence[tuple[int, int, int, int]],
    *,
    beta: float,
    confidence: float,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = 0,
) -> list[dict[str, Interval]]:
    """`bootstrap_binary` for many windows' (tp, fp, fn, tn): one stream per window.

    Each window's generator is seeded by its own counts, so its interval does not depend
    on the other windows; only the arithmetic and the sorting are shared.
    """
    if resamples == 0 or not counts:
        return [dict.fromkeys(BOOTSTRAPPED_BINARY) for _ in counts]
    keys = [
        (tuple(int(c) for c in cells), float(beta), float(confidence), resamples, seed)
        for cells in counts
    ]
    out: list[dict[str, Interval] | None] = [None] * len(keys)
    missing: list[int] = []
    for i, key in enumerate(keys):
        found, value = _MEMO.get(key)
        if found:
            out[i] = value
        else:
            missing.append(i)
    if missing:
        fresh = _bootstrap_binary_many(
            [counts[i] for i in missing],
            beta=beta,
            confidence=confidence,
            resamples=resamples,
            seed=seed,
        )
        for i, value in zip(missing, fresh, strict=True):
            _MEMO.put(keys[i], value)
            out[i] = value
    return [dict(o) for o in out if o is not None]


_MEMO = Memo(50_000)


def _bootstrap_binary_many(
    counts: Sequence[tuple[int, int, int, int]],
    *,
    beta: float,
    confidence: float,
    resamples: int,
    seed: int,
) -> list[dict[str, Interval]]:
    draws = np.zeros((len(counts), resamples, 4), dtype=np.int64)
    for i, cells in enumerate(counts):
        n = sum(cells)
        if n:
            # An empty window keeps its zeros: every measure is then 0/0, i.e. undefined.
            tp, fp, fn, tn = cells
            rng = generator_for(cells, seed)
            draws[i] = rng.multinomial(n, [tp / n, fp / n, fn / n, tn / n], size=resamples)
    return intervals_of_draws(draws.astype(np.float64), beta, confidence)


def intervals_of_draws(
    draws: np.ndarray, beta: float, confidence: float
) -> list[dict[str, Interval]]:
    """Percentile intervals of fbeta, mcc and balanced_accuracy per window, from drawn
    confusion counts of shape (windows, draws, 4) in the order tp, fp, fn, tn."""
    cells_first = np.moveaxis(draws, -1, 0)
    arrays = binary_arrays(cells_first[0], cells_first[1], cells_first[2], cells_first[3], beta)
    stacked = np.concatenate([arrays[name] for name in BOOTSTRAPPED_BINARY])
    intervals = percentile_intervals(stacked, confidence)
    w = draws.shape[0]
    return [
        {name: intervals[j * w + i] for j, name in enumerate(BOOTSTRAPPED_BINARY)} for i in range(w)
    ]


def bootstrap_binary(
    tp: int,
    fp: int,
    fn: int,
    tn: int,
    *,
    beta: float,
    confidence: float,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = 0,
) -> dict[str, Interval]:
    """Percentile intervals for fbeta, mcc and balanced_accuracy from resampled counts."""
    return bootstrap_binary_many(
        [(tp, fp, fn, tn)], beta=beta, confidence=confidence, resamples=resamples, seed=seed
    )[0]


def attach(value: Value, interval: Interval) -> Value:
    """`value` with the bootstrap interval, if there is one."""
    if interval is None:
        return value
    return value.with_interval(interval[0], interval[1])
