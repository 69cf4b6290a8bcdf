"""`Totals`: the declared rollup statistics of some hours of one segment, merging by addition.

The fields follow `store/statistics.py`: every scalar is addressed by name (`t["tp"]`),
every histogram by its name (`t.counts("hist")`, `t.sums("hist")`), and the score
histogram's classes by name (`t.score_counts("pos")`).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np
import orjson

from belated.store import packing
from belated.store.statistics import (
    CELLS,
    COUNTS,
    HISTOGRAM_BY_NAME,
    HISTOGRAMS,
    SCALARS,
    SCORE_CLASSES,
    SUMS,
)

_COUNT_AT = {n: i for i, n in enumerate(COUNTS)}
_SUM_AT = {n: i for i, n in enumerate(SUMS)}
_NONNEGATIVE = [_SUM_AT[s.name] for s in SCALARS if s.nonnegative]
_LABELLED = (_COUNT_AT["n_labelled"], _COUNT_AT["n_implied"])


class Totals:
    """Sufficient statistics of some hours of one segment (see store/statistics.py)."""

    __slots__ = ("scalar_counts", "scalar_sums", "hist_counts", "hist_sums", "cells")

    def __init__(self) -> None:
        self.scalar_counts = np.zeros(len(COUNTS), np.int64)
        self.scalar_sums = np.zeros(len(SUMS), np.float64)
        # a histogram absent from the map is all zeros (left out when not read)
        self.hist_counts: dict[str, np.ndarray] = {}
        self.hist_sums: dict[str, np.ndarray] = {}
        self.cells: dict[str, int] | None = None

    def __getitem__(self, name: str) -> int | float:
        """One scalar statistic by name."""
        if name in _COUNT_AT:
            return int(self.scalar_counts[_COUNT_AT[name]])
        return float(self.scalar_sums[_SUM_AT[name]])

    def set_scalars(self, values: Iterable[Any]) -> None:
        """Take the scalars in declaration order, as SQL returns them (NULL sums are 0)."""
        for scalar, value in zip(SCALARS, values, strict=True):
            if scalar.name in _COUNT_AT:
                self.scalar_counts[_COUNT_AT[scalar.name]] = int(value or 0)
            else:
                self.scalar_sums[_SUM_AT[scalar.name]] = float(value or 0.0)

    def counts(self, name: str) -> np.ndarray:
        """A histogram's counts (zeros when it has none); changes write through."""
        found = self.hist_counts.get(name)
        if found is None:
            found = self.hist_counts[name] = np.zeros(HISTOGRAM_BY_NAME[name].shape, np.int64)
        return found

    def sums(self, name: str) -> np.ndarray:
        """A histogram's score sums per cell (zeros when it has none); changes write through."""
        found = self.hist_sums.get(name)
        if found is None:
            found = self.hist_sums[name] = np.zeros(HISTOGRAM_BY_NAME[name].shape, np.float64)
        return found

    def has(self, name: str) -> bool:
        """Whether a histogram holds anything."""
        return name in self.hist_counts and bool(self.hist_counts[name].any())

    def score_counts(self, cls: str) -> np.ndarray:
        """The score histogram of one class ('pos', 'neg' or 'unlabelled'), a view."""
        row: np.ndarray = self.counts("hist")[SCORE_CLASSES.index(cls)]
        return row

    def score_sums(self, cls: str) -> np.ndarray:
        """The score sums per bin of one class, a view."""
        row: np.ndarray = self.sums("hist")[SCORE_CLASSES.index(cls)]
        return row

    def add(self, other: Totals) -> None:
        """Merge another `Totals` into this one."""
        self.scalar_counts += other.scalar_counts
        self.scalar_sums += other.scalar_sums
        for name, counts in other.hist_counts.items():
            mine = self.hist_counts.get(name)
            self.hist_counts[name] = counts.copy() if mine is None else mine + counts
        for name, sums in other.hist_sums.items():
            mine = self.hist_sums.get(name)
            self.hist_sums[name] = sums.copy() if mine is None else mine + sums
        if other.cells:
            self.cells = dict(self.cells or {})
            for k, v in other.cells.items():
                self.cells[k] = self.cells.get(k, 0) + v

    def nonnegative(self) -> bool:
        """No count below zero (after differences were added)."""
        if (self.scalar_counts < 0).any():
            return False
        if any((c < 0).any() for c in self.hist_counts.values()):
            return False
        return all(v >= 0 for v in (self.cells or {}).values())

    def empty(self) -> bool:
        """No prediction counted: every count and histogram is zero (sums are remainders)."""
        if self.scalar_counts.any() or any(c.any() for c in self.hist_counts.values()):
            return False
        return not any((self.cells or {}).values())

    def drop_remainders(self) -> None:
        """After differences were added: sums of empty groups are exactly 0, sums of
        non-negative terms are not below 0, empty histograms and maps are absent."""
        for name, sums in self.hist_sums.items():
            sums[self.counts(name) == 0] = 0.0
            sums[sums < 0] = 0.0
        if sum(int(self.scalar_counts[i]) for i in _LABELLED) == 0:
            self.scalar_sums[_NONNEGATIVE] = 0.0
        self.scalar_sums[_NONNEGATIVE] = np.maximum(self.scalar_sums[_NONNEGATIVE], 0.0)
        for name in [n for n, c in self.hist_counts.items() if not c.any()]:
            del self.hist_counts[name]
            self.hist_sums.pop(name, None)
        if self.cells is not None:
            self.cells = {k: v for k, v in self.cells.items() if v} or None

    def to_row(self) -> dict[str, Any]:
        """Column values of a rollup row."""
        row: dict[str, Any] = {n: int(v) for n, v in zip(COUNTS, self.scalar_counts, strict=True)}
        row.update({n: float(v) for n, v in zip(SUMS, self.scalar_sums, strict=True)})
        for hist in HISTOGRAMS:
            if not self.has(hist.name):  # absent or all zeros: no blob, and no zeros made
                row[hist.name] = None
                continue
            sums = self.sums(hist.name) if hist.score_sums else None
            row[hist.name] = packing.pack(self.hist_counts[hist.name], sums)
        row[CELLS] = self.cells or None
        return row

    @classmethod
    def from_row(cls, row: Any, skip: frozenset[str] = frozenset()) -> Totals:
        """Totals from a stored rollup row; histograms named in `skip` are not decoded."""
        out = cls()
        out.scalar_counts[:] = [getattr(row, n) for n in COUNTS]
        out.scalar_sums[:] = [getattr(row, n) for n in SUMS]
        for hist in HISTOGRAMS:
            blob = getattr(row, hist.name)
            if blob and hist.name not in skip:
                counts, sums = packing.unpack(hist, blob)
                out.hist_counts[hist.name] = counts
                if sums is not None:
                    out.hist_sums[hist.name] = sums
        cells = getattr(row, CELLS)
        out.cells = dict(cells) if cells else None
        return out

    @classmethod
    def of(cls, scalars: Mapping[str, int | float]) -> Totals:
        """Totals with the given scalars (the others 0): for tests and builders."""
        out = cls()
        for name, value in scalars.items():
            if name in _COUNT_AT:
                out.scalar_counts[_COUNT_AT[name]] = int(value)
            else:
                out.scalar_sums[_SUM_AT[name]] = float(value)
        return out


def cell_key(actual: str, predicted: str) -> str:
    """The key of a multiclass confusion cell in the `cells` map."""
    return orjson.dumps([actual, predicted]).decode()
