"""Tables of rules, evaluated windows (breaches), alerts, webhooks and the delivery outbox."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import (
    Boolean,
    Float,
    ForeignKey,
    Index,
    Integer,
    String,
    Text,
    UniqueConstraint,
    false,
)
from sqlalchemy.orm import Mapped, mapped_column

from belated.store.tables import Base, BigId, Json, UtcDateTime


class Rule(Base):
    """An alert condition on a model."""

    __tablename__ = "rules"
    id: Mapped[str] = mapped_column(String(32), primary_key=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"), index=True)
    kind: Mapped[str] = mapped_column(String(16))
    measure: Mapped[str | None] = mapped_column(String(80), nullable=True)
    granularity: Mapped[str] = mapped_column(String(8))
    settings: Mapped[dict[str, Any]] = mapped_column(Json)
    muted_until: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    created_at: Mapped[datetime] = mapped_column(UtcDateTime)
    updated_at: Mapped[datetime] = mapped_column(UtcDateTime)
    # deleting a rule retires it: no longer evaluated or listed, its alerts and breaches kept
    retired_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)


class RuleWindow(Base):
    """One evaluated (rule, segment, window): clean or a breach with what made it fire."""

    __tablename__ = "rule_windows"
    __table_args__ = (
        UniqueConstraint("rule_id", "segment", "window_start", name="uq_rule_windows_key"),
    )
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    rule_id: Mapped[str] = mapped_column(ForeignKey("rules.id", ondelete="CASCADE"))
    segment: Mapped[str] = mapped_column(String(140))
    window_start: Mapped[datetime] = mapped_column(UtcDateTime)
    window_end: Mapped[datetime] = mapped_column(UtcDateTime)
    breached: Mapped[bool] = mapped_column(Boolean)
    value: Mapped[float | None] = mapped_column(Float, nullable=True)
    low: Mapped[float | None] = mapped_column(Float, nullable=True)
    high: Mapped[float | None] = mapped_column(Float, nullable=True)
    baseline: Mapped[dict[str, Any] | None] = mapped_column(Json, nullable=True)
    p_value: Mapped[float | None] = mapped_column(Float, nullable=True)
    # the value is back within tolerance of the baseline (None: no decision on this window)
    recovered: Mapped[bool | None] = mapped_column(Boolean, nullable=True)
    # decided early, on projected measures of the unsettled window (a settled decision
    # replaces it)
    early: Mapped[bool] = mapped_column(Boolean, default=False, server_default=false())
    # a settled window decided again (its labels were corrected): when, and what it was
    decided_again_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    previous: Mapped[dict[str, Any] | None] = mapped_column(Json, nullable=True)
    alert_id: Mapped[str | None] = mapped_column(String(32), nullable=True)
    evaluated_at: Mapped[datetime] = mapped_column(UtcDateTime)


class Alert(Base):
    """One occurrence of a rule firing for one segment."""

    __tablename__ = "alerts"
    __table_args__ = (
        Index("ix_alerts_project_state", "project_id", "state"),
        UniqueConstraint("project_id", "seq", name="uq_alerts_project_seq"),
    )
    id: Mapped[str] = mapped_column(String(32), primary_key=True)
    # the alert's number in its project: given by AlertSequence, never reused
    seq: Mapped[int] = mapped_column(Integer)
    project_id: Mapped[int] = mapped_column(ForeignKey("projects.id", ondelete="CASCADE"))
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id", ondelete="CASCADE"))
    rule_id: Mapped[str] = mapped_column(ForeignKey("rules.id", ondelete="CASCADE"), index=True)
    segment: Mapped[str] = mapped_column(String(140))
    state: Mapped[str] = mapped_column(String(16))  # raised | noted | cleared
    raised_at: Mapped[datetime] = mapped_column(UtcDateTime)
    noted_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    cleared_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    # the first breached window: when the problem started (not when the job ran)
    started_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    # the baseline as it was when the alert was raised, kept frozen while it is active:
    # value, period, the window starts it pooled and their sufficient statistics
    baseline: Mapped[dict[str, Any] | None] = mapped_column(Json, nullable=True)
    # raised on early looks only: true until a settled window confirms it (`confirmed_at`)
    # or the alert is withdrawn (cleared, `cleared_reason` saying so)
    early: Mapped[bool] = mapped_column(Boolean, default=False, server_default=false())
    confirmed_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    cleared_reason: Mapped[str | None] = mapped_column(Text, nullable=True)


class AlertNote(Base):
    """What a person said about an alert, who said it and when (kept with the alert)."""

    __tablename__ = "alert_notes"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    alert_id: Mapped[str] = mapped_column(ForeignKey("alerts.id", ondelete="CASCADE"), index=True)
    text: Mapped[str] = mapped_column(Text)
    author: Mapped[str] = mapped_column(String(160))
    created_at: Mapped[datetime] = mapped_column(UtcDateTime)


class AlertSequence(Base):
    """The last alert number given out in a project (numbers never repeat, even after the
    alerts that carried them are deleted with their rule)."""

    __tablename__ = "alert_sequences"
    project_id: Mapped[int] = mapped_column(
        ForeignKey("projects.id", ondelete="CASCADE"), primary_key=True
    )
    last_seq: Mapped[int] = mapped_column(Integer)


class Webhook(Base):
    """A destination for signed events; the secret is shown once at creation."""

    __tablename__ = "webhooks"
    id: Mapped[str] = mapped_column(String(32), primary_key=True)
    project_id: Mapped[int] = mapped_column(
        ForeignKey("projects.id", ondelete="CASCADE"), index=True
    )
    url: Mapped[str] = mapped_column(Text)
    secret: Mapped[str] = mapped_column(String(128))
    created_at: Mapped[datetime] = mapped_column(UtcDateTime)
    disabled_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    disabled_reason: Mapped[str | None] = mapped_column(Text, nullable=True)


class Delivery(Base):
    """One event for one webhook: the outbox row, written with the alert change."""

    __tablename__ = "deliveries"
    __table_args__ = (Index("ix_deliveries_state_next", "state", "next_attempt_at"),)
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    webhook_id: Mapped[str] = mapped_column(
        ForeignKey("webhooks.id", ondelete="CASCADE"), index=True
    )
    event_id: Mapped[str] = mapped_column(String(40))
    event_type: Mapped[str] = mapped_column(String(32))
    alert_id: Mapped[str] = mapped_column(String(32))
    payload: Mapped[str] = mapped_column(Text)
    state: Mapped[str] = mapped_column(String(16))  # pending | delivered | expired | disabled
    attempts: Mapped[int] = mapped_column(Integer)
    next_attempt_at: Mapped[datetime] = mapped_column(UtcDateTime)
    last_status: Mapped[int | None] = mapped_column(Integer, nullable=True)
    last_error: Mapped[str | None] = mapped_column(Text, nullable=True)
    created_at: Mapped[datetime] = mapped_column(UtcDateTime)
    delivered_at: Mapped[datetime | None] = mapped_column(UtcDateTime, nullable=True)
    expires_at: Mapped[datetime] = mapped_column(UtcDateTime)
