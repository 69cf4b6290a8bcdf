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

from belated.store.tables import Base, Json, UtcDateTime


class Rollup(Base):
    """Sufficient statistics of one (model, level, start, segment)."""

    __tablename__ = "rollups"
    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True
    )
    level: Mapped[str] = mapped_column(String(1), primary_key=True)
    start: Mapped[int] = mapped_column(Integer, primary_key=True)
    seg_key: Mapped[str] = mapped_column(String(64), primary_key=True)
    seg_value: Mapped[str] = mapped_column(String(64), primary_key=True)
    n_pred: Mapped[int] = mapped_column(BigInteger)
    n_labelled: Mapped[int] = mapped_column(BigInteger)
    n_implied: Mapped[int] = mapped_column(BigInteger)
    n_pred_pos: Mapped[int] = mapped_column(BigInteger)
    tp: Mapped[int] = mapped_column(BigInteger)
    fp: Mapped[int] = mapped_column(BigInteger)
    fn: Mapped[int] = mapped_column(BigInteger)
    tn: Mapped[int] = mapped_column(BigInteger)
    brier_sum: Mapped[float] = mapped_column(Float)
    logloss_sum: Mapped[float] = mapped_column(Float)
    exp_tp: Mapped[float] = mapped_column(Float)
    exp_fp: Mapped[float] = mapped_column(Float)
    exp_fn: Mapped[float] = mapped_column(Float)
    exp_tn: Mapped[float] = mapped_column(Float)
    hist: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    delays: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    cells: Mapped[dict[str, int] | None] = mapped_column(Json, nullable=True)
    # the implied-negative cutoff an hourly row was aggregated with (NULL: none, or daily)
    cut: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)


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


_ = Float  # keep the import list stable for readers of the schema
