"""Rollup tables: sufficient statistics per (model, hour, segment), derived from raw rows.

The whole model is the segment ('', ''); a single tag is (key, value). Histogram bins and
multiclass cells are stored sparsely, one row per non-empty cell.
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import BigInteger, Float, ForeignKey, Integer, String
from sqlalchemy.orm import Mapped, mapped_column

from belated.store.tables import Base, UtcDateTime


class Rollup(Base):
    """Scalar sufficient statistics of one (model, hour, segment)."""

    __tablename__ = "rollups"
    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True
    )
    hour: Mapped[int] = mapped_column(Integer, primary_key=True)
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


class RollupBin(Base):
    """One non-empty score-histogram bin; `cls` is 'all', 'pos' or 'neg' (actual class)."""

    __tablename__ = "rollup_bins"
    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True
    )
    hour: Mapped[int] = mapped_column(Integer, primary_key=True)
    seg_key: Mapped[str] = mapped_column(String(64), primary_key=True)
    seg_value: Mapped[str] = mapped_column(String(64), primary_key=True)
    cls: Mapped[str] = mapped_column(String(8), primary_key=True)
    bin: Mapped[int] = mapped_column(Integer, primary_key=True)
    n: Mapped[int] = mapped_column(BigInteger)
    ssum: Mapped[float] = mapped_column(Float)


class RollupCell(Base):
    """One non-empty cell of a multiclass confusion matrix (actual, predicted)."""

    __tablename__ = "rollup_cells"
    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True
    )
    hour: Mapped[int] = mapped_column(Integer, primary_key=True)
    seg_key: Mapped[str] = mapped_column(String(64), primary_key=True)
    seg_value: Mapped[str] = mapped_column(String(64), primary_key=True)
    actual: Mapped[str] = mapped_column(String(128), primary_key=True)
    predicted: Mapped[str] = mapped_column(String(128), primary_key=True)
    n: Mapped[int] = mapped_column(BigInteger)


class RollupDelay(Base):
    """One non-empty bin of the label-delay histogram (whole model only)."""

    __tablename__ = "rollup_delays"
    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True
    )
    hour: Mapped[int] = mapped_column(Integer, primary_key=True)
    bin: Mapped[int] = mapped_column(Integer, primary_key=True)
    n: Mapped[int] = mapped_column(BigInteger)


class SegmentValue(Base):
    """A tag key:value admitted to rollups (the rest roll up under '(other)')."""

    __tablename__ = "segment_values"
    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True
    )
    key: Mapped[str] = mapped_column(String(64), primary_key=True)
    value: Mapped[str] = mapped_column(String(64), primary_key=True)
    admitted_at: Mapped[datetime] = mapped_column(UtcDateTime)
