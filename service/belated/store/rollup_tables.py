"""Rollup tables: sufficient statistics per (model, level, start, segment), derived from raw rows.

`level` is 'h' (one hour; `start` is the epoch hour) or 'd' (one UTC day; `start` is the epoch
hour at midnight). Daily rows are sums of their hourly rows, kept so that a year of daily
windows reads 365 rows per segment instead of 8,760. The whole model is the segment
('', ''); a single tag is (key, value).

Histograms are packed numpy arrays (see belated.store.packing): they are built from the
database's GROUP BY output and merge by addition, never recomputed from rows in Python.
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import BigInteger, Float, ForeignKey, Integer, LargeBinary, String
from sqlalchemy.orm import Mapped, mapped_column

from belated.store.statistics import CELLS, HISTOGRAMS, SCALARS, Kind
from belated.store.tables import Base, Json, UtcDateTime


class Rollup(Base):
    """Sufficient statistics of one (model, level, start, segment).

    The statistic columns are not spelled out here: they are added below, one per declared
    statistic of `belated.store.statistics`.
    """

    __tablename__ = "rollups"
    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True
    )
    level: Mapped[str] = mapped_column(String(1), primary_key=True)
    start: Mapped[int] = mapped_column(Integer, primary_key=True)
    seg_key: Mapped[str] = mapped_column(String(64), primary_key=True)
    seg_value: Mapped[str] = mapped_column(String(64), primary_key=True)
    cells: Mapped[dict[str, int] | None] = mapped_column(Json, nullable=True)
    # the implied-negative cutoff an hourly row was aggregated with (NULL: none, or daily):
    # a label change folded in later judges the row's old state with it
    negative_cutoff: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)


_COLUMN_TYPES = {Kind.COUNT: BigInteger, Kind.SUM: Float}
for _scalar in SCALARS:
    setattr(Rollup, _scalar.name, mapped_column(_COLUMN_TYPES[_scalar.kind], nullable=False))
for _hist in HISTOGRAMS:
    setattr(Rollup, _hist.name, mapped_column(LargeBinary, nullable=True))
assert CELLS == "cells"


class SegmentValue(Base):
    """A tag key:value admitted to rollups (later values roll up under '(other)')."""

    __tablename__ = "segment_values"
    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True
    )
    key: Mapped[str] = mapped_column(String(64), primary_key=True)
    value: Mapped[str] = mapped_column(String(64), primary_key=True)
    admitted_at: Mapped[datetime] = mapped_column(UtcDateTime)


class SegmentKey(Base):
    """A tag key admitted to rollups for a model (its `segment_keys`, or the first 8 seen)."""

    __tablename__ = "segment_keys"
    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True
    )
    key: Mapped[str] = mapped_column(String(64), primary_key=True)
    admitted_at: Mapped[datetime] = mapped_column(UtcDateTime)
