"""Database tables (SQLAlchemy 2 declarative); API schemas live apart in belated.api.schemas."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Text,
    UniqueConstraint,
    text,
    true,
)
from sqlalchemy.dialects.postgresql import JSONB
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

# Stable constraint names on both stores, so migrations can refer to them.
NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

# SQLite only auto-increments INTEGER PRIMARY KEY; PostgreSQL gets a 64-bit identity.
BigId = BigInteger().with_variant(Integer(), "sqlite")
Json = JSON().with_variant(JSONB(), "postgresql")
UtcDateTime = DateTime(timezone=True)


class Base(DeclarativeBase):
    """Declarative base with the naming convention."""

    metadata = MetaData(naming_convention=NAMING)


class Project(Base):
    """A tenant: everything else belongs to exactly one project."""

    __tablename__ = "projects"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    created_at: Mapped[datetime] = mapped_column(UtcDateTime)


class Token(Base):
    """An API token; only the SHA-256 of the secret is kept."""

    __tablename__ = "tokens"
    id: Mapped[str] = mapped_column(String(32), primary_key=True)
    project_id: Mapped[int] = mapped_column(ForeignKey("projects.id", ondelete="CASCADE"))
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    scopes: Mapped[str] = mapped_column(String(64))
    name: Mapped[str | None] = mapped_column(String(128), nullable=True)
    created_at: Mapped[datetime] = mapped_column(UtcDateTime)
    revoked_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)


class ModelRow(Base):
    """One deployed classifier and its monitoring settings."""

    __tablename__ = "models"
    __table_args__ = (UniqueConstraint("project_id", "name", name="uq_models_project_name"),)
    __mapper_args__ = {"eager_defaults": False}
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    project_id: Mapped[int] = mapped_column(ForeignKey("projects.id", ondelete="CASCADE"))
    name: Mapped[str] = mapped_column(String(64))
    kind: Mapped[str] = mapped_column(String(16))
    classes: Mapped[list[str]] = mapped_column(Json)
    positive: Mapped[str | None] = mapped_column(String(128), nullable=True)
    threshold: Mapped[float] = mapped_column(Float)
    label_delay_days: Mapped[float] = mapped_column(Float)
    min_coverage: Mapped[float] = mapped_column(Float)
    negative_after_days: Mapped[float | None] = mapped_column(Float, nullable=True)
    segment_keys: Mapped[list[str] | None] = mapped_column(Json, nullable=True)
    # {"start", "end"} (ISO UTC): the settled period standing for "as trained"; None: the
    # first 30 settled days
    reference: Mapped[dict[str, str] | None] = mapped_column(Json, nullable=True)
    # the IANA zone whose midnights start day and week windows (belated.zones); an insert
    # that leaves it out takes the server default, which is not read back at once (no
    # eager defaults), so rows written against older schemas, without it, still insert
    time_zone: Mapped[str] = mapped_column(String(64), server_default="UTC")
    # days raw rows and pending labels are kept; None: the default (store/retention.py).
    # A server default, as for time_zone: an insert that leaves it out is then written
    # without it, so that rows written against older schemas still insert
    keep_raw_days: Mapped[float | None] = mapped_column(
        Float, nullable=True, server_default=text("NULL")
    )
    # "http": raw rows posted to the API; "lake": rollup rows uploaded (belated.lake)
    source: Mapped[str] = mapped_column(String(8), server_default="http")
    # the epoch hour (a UTC midnight) below which raw rows were dropped by retention
    # (store/raw_retention.py); None: none dropped. A server default, as for keep_raw_days
    raw_from_hour: Mapped[int | None] = mapped_column(
        Integer, nullable=True, server_default=text("NULL")
    )
    created_at: Mapped[datetime] = mapped_column(UtcDateTime)
    updated_at: Mapped[datetime] = mapped_column(UtcDateTime)


class ThresholdChange(Base):
    """History of a model's decision threshold."""

    __tablename__ = "threshold_changes"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"), index=True)
    threshold: Mapped[float] = mapped_column(Float)
    changed_at: Mapped[datetime] = mapped_column(UtcDateTime)


# The tables a write fills row by row (predictions, prediction_ids, labels, pending_labels,
# dirty_buckets, label_changes) keep `model_id` without a foreign key: checking it cost
# PostgreSQL a look-up and a FOR KEY SHARE lock of the model row for every row inserted,
# after the statement (migration 0021). A model's rows are deleted table by table, and rows
# that a write racing the deletion commits afterwards are swept by the jobs (store/purge.py).


class Prediction(Base):
    """One scored item with its current label (the label history is in `labels`).

    `hour` is the prediction time in whole hours since the Unix epoch: the rollup key.
    `delay_h` is hours from `ts` to the label's outcome time, kept for the delay histogram.
    """

    __tablename__ = "predictions"
    __table_args__ = (
        UniqueConstraint("model_id", "pid", name="uq_predictions_model_pid"),
        Index("ix_predictions_model_hour", "model_id", "hour"),
        Index("ix_predictions_model_ts", "model_id", "ts"),
    )
    row_id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(Integer)  # no foreign key (above)
    pid: Mapped[str] = mapped_column(String(128))
    ts: Mapped[datetime] = mapped_column(UtcDateTime)
    hour: Mapped[int] = mapped_column(Integer)
    score: Mapped[float | None] = mapped_column(Float, nullable=True)
    scores: Mapped[dict[str, float] | None] = mapped_column(Json, nullable=True)
    predicted: Mapped[str] = mapped_column(String(128))
    tags: Mapped[dict[str, str] | None] = mapped_column(Json, nullable=True)
    actual: Mapped[str | None] = mapped_column(String(128), nullable=True)
    label_ts: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    delay_h: Mapped[float | None] = mapped_column(Float, nullable=True)
    received_at: Mapped[datetime] = mapped_column(UtcDateTime)


class PredictionId(Base):
    """PostgreSQL only: where each stored prediction is, by (model, id) (the id registry).

    `predictions` is partitioned by day there, and a unique index within partitions cannot
    see an id stored under another day; store/partitions.py explains the layout.
    """

    __tablename__ = "prediction_ids"
    model_id: Mapped[int] = mapped_column(Integer, primary_key=True)  # no foreign key (above)
    pid: Mapped[str] = mapped_column(String(128), primary_key=True)
    hour: Mapped[int] = mapped_column(Integer)


class Label(Base):
    """Every label value that changed something, in arrival order (the correction history)."""

    __tablename__ = "labels"
    __table_args__ = (Index("ix_labels_model_pid", "model_id", "pid"),)
    row_id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(Integer)  # no foreign key (above)
    pid: Mapped[str] = mapped_column(String(128))
    actual: Mapped[str] = mapped_column(String(128))
    ts: Mapped[datetime] = mapped_column(UtcDateTime)
    change: Mapped[str] = mapped_column(String(16))  # first | correction | pending
    received_at: Mapped[datetime] = mapped_column(UtcDateTime)


class PendingLabel(Base):
    """A label whose prediction has not arrived yet; joined when it does."""

    __tablename__ = "pending_labels"
    __table_args__ = (UniqueConstraint("model_id", "pid", name="uq_pending_labels_model_pid"),)
    row_id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(Integer)  # no foreign key (above)
    pid: Mapped[str] = mapped_column(String(128))
    actual: Mapped[str] = mapped_column(String(128))
    ts: Mapped[datetime] = mapped_column(UtcDateTime)
    received_at: Mapped[datetime] = mapped_column(UtcDateTime)


class DirtyBucket(Base):
    """A mark that a (model, hour)'s rollups are stale: one row per write, never updated.

    Concurrent writers of one hour each insert a row of their own (no row that every writer
    updates); the refresh takes every mark of the hours it claims. `recompute` is true when
    the hour must be aggregated again from raw rows (new predictions, implied negatives, a
    rebuild); false when only labels changed, whose effect the refresh adds from
    `label_changes` instead.
    """

    __tablename__ = "dirty_buckets"
    __table_args__ = (Index("ix_dirty_buckets_model_hour", "model_id", "hour"),)
    seq: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(Integer)  # no foreign key (above)
    hour: Mapped[int] = mapped_column(Integer)
    marked_at: Mapped[datetime] = mapped_column(UtcDateTime)
    recompute: Mapped[bool] = mapped_column(Boolean, default=True, server_default=true())


class LabelChange(Base):
    """One change of a stored prediction's label, not yet folded into its hour's rollups.

    The refresh subtracts the old state's contribution and adds the new one's, so that
    late labels cost work in proportion to their number, not to the rows of their hours.
    """

    __tablename__ = "label_changes"
    __table_args__ = (Index("ix_label_changes_model_hour", "model_id", "hour"),)
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    model_id: Mapped[int] = mapped_column(Integer)  # no foreign key (above)
    hour: Mapped[int] = mapped_column(Integer)
    row_id: Mapped[int] = mapped_column(BigInteger)
    old_actual: Mapped[str | None] = mapped_column(String(128), nullable=True)
    old_delay_h: Mapped[float | None] = mapped_column(Float, nullable=True)
    new_actual: Mapped[str] = mapped_column(String(128))
    new_delay_h: Mapped[float | None] = mapped_column(Float, nullable=True)


class DroppedId(Base):
    """An id whose raw rows retention dropped, kept for one more keep_raw_days so that a
    late label for it is answered `expired` (store/raw_retention.py)."""

    __tablename__ = "dropped_ids"
    __table_args__ = (Index("ix_dropped_ids_model_hour", "model_id", "hour"),)
    model_id: Mapped[int] = mapped_column(
        ForeignKey("models.id", ondelete="CASCADE"), primary_key=True
    )
    pid: Mapped[str] = mapped_column(String(128), primary_key=True)
    hour: Mapped[int] = mapped_column(Integer)


class Marker(Base):
    """A dated note on a model's timeline ("supplier change in the north"), drawn on charts."""

    __tablename__ = "markers"
    __table_args__ = (Index("ix_markers_model_at", "model_id", "at"),)
    id: Mapped[str] = mapped_column(String(32), primary_key=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"))
    at: Mapped[datetime] = mapped_column(UtcDateTime)
    text: Mapped[str] = mapped_column(Text)
    author: Mapped[str] = mapped_column(String(160))
    created_at: Mapped[datetime] = mapped_column(UtcDateTime)


class ServiceState(Base):
    """Small key/value facts the jobs leave for readers (last refresh, counters)."""

    __tablename__ = "service_state"
    key: Mapped[str] = mapped_column(String(64), primary_key=True)
    value: Mapped[Any] = mapped_column(Json)
    updated_at: Mapped[datetime] = mapped_column(UtcDateTime)


__all__ = [
    "Base",
    "Project",
    "Token",
    "ModelRow",
    "ThresholdChange",
    "Prediction",
    "Label",
    "PendingLabel",
    "DirtyBucket",
    "DroppedId",
    "Marker",
    "ServiceState",
]
