"""A mutable accumulator of rollup statistics that merges by addition."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import orjson

from belated.store.packing import N_BINS, pack_delays, pack_hist, unpack_delays, unpack_hist
from belated.store.rollup_sql import SCALARS

COUNTS = SCALARS[:8]
SUMS = SCALARS[8:]


@dataclass
class Acc:
    """Sufficient statistics of some hours of one segment."""

    counts: np.ndarray = field(default_factory=lambda: np.zeros(len(COUNTS), np.int64))
    sums: np.ndarray = field(default_factory=lambda: np.zeros(len(SUMS), np.float64))
    hist: np.ndarray = field(default_factory=lambda: np.zeros((3, N_BINS), np.int64))
    hsum: np.ndarray = field(default_factory=lambda: np.zeros((3, N_BINS), np.float64))
    delays: np.ndarray | None = None
    cells: dict[str, int] | None = None

    def set_scalars(self, values: Any) -> None:
        """Take a SCALARS row from the database (NULL sums are 0)."""
        self.counts[:] = [int(v or 0) for v in values[: len(COUNTS)]]
        self.sums[:] = [float(v or 0.0) for v in values[len(COUNTS) :]]

    def add(self, other: Acc) -> None:
        """Merge another accumulator into this one."""
        self.counts += other.counts
        self.sums += other.sums
        self.hist += other.hist
        self.hsum += other.hsum
        if other.delays is not None:
            self.delays = other.delays.copy() if self.delays is None else self.delays + other.delays
        if other.cells:
            self.cells = dict(self.cells or {})
            for k, v in other.cells.items():
                self.cells[k] = self.cells.get(k, 0) + v

    def valid(self) -> bool:
        """No count below zero (after differences were added)."""
        ok = bool((self.counts >= 0).all() and (self.hist >= 0).all())
        ok = ok and (self.delays is None or bool((self.delays >= 0).all()))
        return ok and all(v >= 0 for v in (self.cells or {}).values())

    def tidy(self) -> None:
        """After differences: sums of empty groups are exactly 0, empty maps are absent."""
        self.hsum[self.hist == 0] = 0.0
        losses = [SUMS.index("brier_sum"), SUMS.index("logloss_sum")]
        if self.counts[COUNTS.index("n_labelled")] + self.counts[COUNTS.index("n_implied")] == 0:
            self.sums[losses] = 0.0
        # sums of non-negative terms: a rounding remainder below zero is zero
        self.sums[losses] = np.maximum(self.sums[losses], 0.0)
        self.hsum[self.hsum < 0] = 0.0
        if self.delays is not None and not self.delays.any():
            self.delays = None
        if self.cells is not None:
            self.cells = {k: v for k, v in self.cells.items() if v} or None

    def scalar(self, name: str) -> int | float:
        """One scalar statistic by name."""
        if name in COUNTS:
            return int(self.counts[COUNTS.index(name)])
        return float(self.sums[SUMS.index(name)])

    def to_row(self) -> dict[str, Any]:
        """Column values of a rollup row."""
        row: dict[str, Any] = {n: int(v) for n, v in zip(COUNTS, self.counts, strict=True)}
        row.update({n: float(v) for n, v in zip(SUMS, self.sums, strict=True)})
        row["hist"] = pack_hist(self.hist, self.hsum) if self.hist.any() else None
        row["delays"] = pack_delays(self.delays) if self.delays is not None else None
        row["cells"] = self.cells or None
        return row

    @classmethod
    def from_row(cls, row: Any, delays: bool = True) -> Acc:
        """An accumulator from a stored rollup row (`delays=False`: leave the delay bins)."""
        hist, hsum = unpack_hist(row.hist)
        return cls(
            counts=np.array([getattr(row, n) for n in COUNTS], np.int64),
            sums=np.array([getattr(row, n) for n in SUMS], np.float64),
            hist=hist,
            hsum=hsum,
            delays=unpack_delays(row.delays) if delays and row.delays else None,
            cells=dict(row.cells) if row.cells else None,
        )


def cell_key(actual: str, predicted: str) -> str:
    """The key of a multiclass confusion cell in the `cells` map."""
    return orjson.dumps([actual, predicted]).decode()
