"""The rollup statistics, declared once.

Every statistic a rollup row keeps is declared here with its name, its kind, how SQL
aggregates it from raw rows (or from logged label changes, each weighted -1 or +1), and how
it merges (by addition, always). Everything else derives from this module:

- the SELECT lists and GROUP BY columns of `store/rollup_sql.py`,
- the columns of the `rollups` table (`store/rollup_tables.py`) and their binary COPY types,
- the accumulator `store/totals.py` (`Totals`), addressed by name,
- the input of the pure measures (`belated.stats.window.WindowStats`), by name.

Adding a statistic is one entry in `SCALARS` or `HISTOGRAMS` plus an Alembic migration that
adds its column (see DEVELOPERS.md, "Add a rollup statistic").

Kinds:
- `COUNT`: an integer sum (BIGINT, `int8` in COPY); merges exactly.
- `SUM`: a float sum (DOUBLE PRECISION, `float8`); merges to within rounding of the order.
- a `Histogram`: integer counts over one or two axes of cells (and optionally the float sum
  of the score in each cell), stored as one sparse blob (`store/packing.py`).
- `CELLS`: the multiclass confusion counts, a JSON map {"[actual, predicted]": count}.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from enum import StrEnum
from functools import cached_property

import numpy as np

from belated.stats.delays import (
    HOURLY_UNTIL,
    LAST_DELAY_BIN,
    N_DELAY_BINS,
    SIX_HOURLY_UNTIL,
    delay_bin,
)
from belated.stats.ranking import N_BINS

EPS = float(np.finfo(np.float64).eps)  # log loss clips p to [eps, 1 - eps]
TINY = "1e-150"  # a score whose square would underflow


class Kind(StrEnum):
    """How a scalar statistic is typed, stored and merged."""

    COUNT = "count"
    SUM = "sum"


@dataclass(frozen=True)
class Terms:
    """The SQL pieces one aggregation is written with, for one scope and dialect.

    `actual` is the effective actual class (the label, or the negative class for an implied
    negative; NULL when unlabelled), `implied` is 1 for an implied negative, `weight` is 1
    for raw rows and -1/+1 for the old/new state of a logged label change, `rows` counts the
    rows (weighted), `flagged` is true for a predicted positive, `clipped` the score clipped
    to [eps, 1 - eps]. `floor_int`, `least` and `greatest` are the dialect's spellings.
    """

    actual: str
    implied: str
    weight: str
    rows: str
    flagged: str
    clipped: str
    floor_int: Callable[[str], str]
    least: Callable[[str, str], str]

    def weighted(self, expr: str) -> str:
        """`expr` times the row weight (the plain expression for raw rows)."""
        return expr if self.weight == "1" else f"{self.weight} * {expr}"

    def count_if(self, cond: str) -> str:
        """The weighted count of rows where `cond` holds."""
        return f"SUM(CASE WHEN {cond} THEN {self.weight} ELSE 0 END)"

    def sum_if(self, *cases: tuple[str, str]) -> str:
        """The weighted sum of the first matching case's expression (0 where none matches)."""
        whens = " ".join(f"WHEN {c} THEN {self.weighted(e)}" for c, e in cases)
        return f"SUM(CASE {whens} ELSE 0 END)"


@dataclass(frozen=True)
class Scalar:
    """One number per rollup row."""

    name: str
    kind: Kind
    sql: Callable[[Terms], str]
    doc: str
    binary_only: bool = True  # 0 for multiclass models (their confusion is in CELLS)
    nonnegative: bool = False  # a sum of non-negative terms: a rounding remainder below 0 is 0

    @property
    def pg_type(self) -> str:
        """The PostgreSQL type name used by binary COPY."""
        return "int8" if self.kind is Kind.COUNT else "float8"


POS, NEG = ":pos", ":neg"  # the positive and negative class, bound per query

SCALARS: tuple[Scalar, ...] = (
    Scalar("n_pred", Kind.COUNT, lambda t: t.rows, "predictions", binary_only=False),
    Scalar(
        "n_labelled",
        Kind.COUNT,
        lambda t: t.count_if(f"{t.actual} IS NOT NULL"),
        "labelled predictions (explicit labels and implied negatives)",
        binary_only=False,
    ),
    Scalar(
        "n_implied",
        Kind.COUNT,
        lambda t: f"SUM({t.weighted(t.implied)})",
        "implied negatives (no label `negative_after_days` after the prediction)",
        binary_only=False,
    ),
    Scalar(
        "n_pred_pos",
        Kind.COUNT,
        lambda t: t.count_if(t.flagged),
        "predicted positives, labelled or not",
        binary_only=False,
    ),
    Scalar("tp", Kind.COUNT, lambda t: t.count_if(f"{t.flagged} AND {t.actual} = {POS}"), "TP"),
    Scalar("fp", Kind.COUNT, lambda t: t.count_if(f"{t.flagged} AND {t.actual} = {NEG}"), "FP"),
    Scalar(
        "fn", Kind.COUNT, lambda t: t.count_if(f"NOT ({t.flagged}) AND {t.actual} = {POS}"), "FN"
    ),
    Scalar(
        "tn", Kind.COUNT, lambda t: t.count_if(f"NOT ({t.flagged}) AND {t.actual} = {NEG}"), "TN"
    ),
    Scalar(
        "brier_sum",
        Kind.SUM,
        lambda t: t.sum_if(
            (f"{t.actual} = {POS}", "(1 - score) * (1 - score)"),
            # PostgreSQL raises an error where a product underflows to 0 (a subnormal score
            # squared); such a term is below any float sum's resolution anyway
            (f"{t.actual} = {NEG}", f"(CASE WHEN score < {TINY} THEN 0 ELSE score * score END)"),
        ),
        "sum of squared errors of the score over labelled predictions",
        nonnegative=True,
    ),
    Scalar(
        "logloss_sum",
        Kind.SUM,
        lambda t: t.sum_if(
            (f"{t.actual} = {POS}", f"(-ln({t.clipped}))"),
            (f"{t.actual} = {NEG}", f"(-ln(1 - {t.clipped}))"),
        ),
        "sum of log losses over labelled predictions (p clipped to [eps, 1 - eps])",
        nonnegative=True,
    ),
    Scalar(
        "exp_tp",
        Kind.SUM,
        lambda t: t.sum_if((t.flagged, "score")),
        "label-free expected TP: sum of p over predicted positives",
    ),
    Scalar(
        "exp_fp",
        Kind.SUM,
        lambda t: t.sum_if((t.flagged, "(1 - score)")),
        "label-free expected FP: sum of 1 - p over predicted positives",
    ),
    Scalar(
        "exp_fn",
        Kind.SUM,
        lambda t: t.sum_if((f"NOT ({t.flagged})", "score")),
        "label-free expected FN: sum of p over predicted negatives",
    ),
    Scalar(
        "exp_tn",
        Kind.SUM,
        lambda t: t.sum_if((f"NOT ({t.flagged})", "(1 - score)")),
        "label-free expected TN: sum of 1 - p over predicted negatives",
    ),
)

COUNTS: tuple[str, ...] = tuple(s.name for s in SCALARS if s.kind is Kind.COUNT)
SUMS: tuple[str, ...] = tuple(s.name for s in SCALARS if s.kind is Kind.SUM)
SCALAR_BY_NAME = {s.name: s for s in SCALARS}


@dataclass(frozen=True)
class Axis:
    """One axis of a histogram: its cells and the SQL expression of a row's cell index."""

    name: str
    cells: tuple[str, ...] | int  # named cells, or a number of numbered cells
    sql: Callable[[Terms], str]

    @property
    def size(self) -> int:
        """The number of cells along the axis."""
        return self.cells if isinstance(self.cells, int) else len(self.cells)

    def index(self, cell: str) -> int:
        """The position of a named cell."""
        assert not isinstance(self.cells, int)
        return self.cells.index(cell)


@dataclass(frozen=True)
class Histogram:
    """Counts per cell of one or two axes, over the rows where `where` holds."""

    name: str  # also the blob column
    axes: tuple[Axis, ...]
    where: Callable[[Terms], str]
    doc: str
    score_sums: bool = False  # keep the sum of the score in each cell beside its count
    binary_only: bool = False
    whole_model_only: bool = False  # kept for the whole model, not per segment

    @cached_property
    def shape(self) -> tuple[int, ...]:
        """The shape of the count (and score-sum) array."""
        return tuple(a.size for a in self.axes)

    @cached_property
    def n_cells(self) -> int:
        """The number of cells."""
        return int(np.prod(self.shape))


# the actual class of a labelled (or implied) prediction, and "unlabelled"
SCORE_CLASSES = ("pos", "neg", "unlabelled")


def _score_class(t: Terms) -> str:
    return f"(CASE WHEN {t.actual} = {POS} THEN 0 WHEN {t.actual} IS NOT NULL THEN 1 ELSE 2 END)"


def _score_bin(t: Terms) -> str:
    # Bins [k/100, (k+1)/100), the last one closed at 1, exactly as "score >= k/100" decides
    # (every score lies in [0, 1]). floor(score * 100) alone is one bin low where the product
    # rounds down (0.29 * 100 = 28.999...): compare with the edges k/100, each computed as the
    # correctly rounded double quotient, as Python's k / 100 is.
    k = t.floor_int(f"score * {N_BINS}")
    edge = "CAST({} AS DOUBLE PRECISION) / " + str(N_BINS)
    step = (
        f"CASE WHEN score >= {edge.format(f'{k} + 1')} THEN 1"
        f" WHEN score < {edge.format(k)} THEN -1 ELSE 0 END"
    )
    return t.least(f"{k} + {step}", str(N_BINS - 1))


def _delay_bin(t: Terms) -> str:
    # the bins of belated.stats.delays: hourly, then 6-hourly, then daily, then one open bin;
    # every delay here is non-negative (negative ones are stored as 0)
    h, six, day = "delay_h", delay_bin(HOURLY_UNTIL), delay_bin(SIX_HOURLY_UNTIL)
    hourly = t.floor_int(h)
    six_hourly = f"{six} + {t.floor_int(f'({h} - {HOURLY_UNTIL}) / 6')}"
    daily = t.least(
        f"{day} + {t.floor_int(f'({h} - {SIX_HOURLY_UNTIL}) / 24')}", str(LAST_DELAY_BIN)
    )
    return (
        f"(CASE WHEN {h} < {HOURLY_UNTIL} THEN {hourly}"
        f" WHEN {h} < {SIX_HOURLY_UNTIL} THEN {six_hourly} ELSE {daily} END)"
    )


# the actual class of an explicit label (implied negatives have no delay)
DELAY_CLASSES = ("pos", "neg")


def _delay_class(_t: Terms) -> str:
    return f"(CASE WHEN actual = {POS} THEN 0 ELSE 1 END)"


# score bands of the band arrival curves: N_BANDS equal runs of the score histogram's bins
N_BANDS = 10
BAND_BINS = N_BINS // N_BANDS


def _score_band(t: Terms) -> str:
    # the band of the score's bin (the same bin the score histogram puts it in)
    return t.floor_int(f"({_score_bin(t)}) / {float(BAND_BINS)}")


HISTOGRAMS: tuple[Histogram, ...] = (
    Histogram(
        "hist",
        (Axis("class", SCORE_CLASSES, _score_class), Axis("bin", N_BINS, _score_bin)),
        lambda _t: "score IS NOT NULL",
        "scores by actual class (or unlabelled) in equal-width bins, with the score sums",
        score_sums=True,
        binary_only=True,
    ),
    Histogram(
        "delays",
        (Axis("bin", N_DELAY_BINS, _delay_bin),),
        lambda _t: "actual IS NOT NULL AND delay_h IS NOT NULL",
        "label delays (hours from prediction to label) of explicit labels",
        whole_model_only=True,
    ),
    Histogram(
        "delays_by_class",
        (Axis("class", DELAY_CLASSES, _delay_class), Axis("bin", N_DELAY_BINS, _delay_bin)),
        lambda _t: "actual IS NOT NULL AND delay_h IS NOT NULL",
        "label delays of explicit labels by actual class (the arrival curves' input)",
        binary_only=True,
    ),
    Histogram(
        "delays_by_band",
        (
            Axis("class", DELAY_CLASSES, _delay_class),
            Axis("band", N_BANDS, _score_band),
            Axis("bin", N_DELAY_BINS, _delay_bin),
        ),
        lambda _t: "actual IS NOT NULL AND delay_h IS NOT NULL AND score IS NOT NULL",
        "label delays of explicit labels by actual class and score band (band arrival curves)",
        binary_only=True,
        # a segment rarely has 200 labels of a class in two score bands: the whole model's
        # bands only, which spares the refresh a GROUP BY of 9,240 cells per segment value
        whole_model_only=True,
    ),
)
HISTOGRAM_BY_NAME = {h.name: h for h in HISTOGRAMS}

# the multiclass confusion counts: a JSON map of "[actual, predicted]" to count
CELLS = "cells"


def pg_types() -> dict[str, str]:
    """PostgreSQL type names of every rollup column, for binary COPY."""
    return {
        "model_id": "int4",
        "level": "varchar",
        "start": "int4",
        "seg_key": "varchar",
        "seg_value": "varchar",
        **{s.name: s.pg_type for s in SCALARS},
        **dict.fromkeys((h.name for h in HISTOGRAMS), "bytea"),
        CELLS: "jsonb",
        "negative_cutoff": "timestamptz",
    }
