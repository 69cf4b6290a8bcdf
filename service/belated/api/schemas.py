"""Pydantic schemas of the API (apart from the database tables)."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from belated.zones import zone_problem

NAME_PATTERN = r"^[a-z0-9][a-z0-9._-]{0,63}$"


def _classes(values: list[str | int] | None) -> list[str] | None:
    if values is None:
        return None
    out = [str(v) for v in values]
    if len(out) < 2 or len(set(out)) != len(out):
        raise ValueError("classes must list at least two distinct values")
    if any(not c or len(c) > 128 for c in out):
        raise ValueError("each class is 1 to 128 characters")
    return out


class ReferenceRange(BaseModel):
    """A fixed, settled period that stands for "as trained" (its prevalence is the training
    prior of the implied measures)."""

    model_config = ConfigDict(extra="forbid")

    start: datetime
    end: datetime

    @model_validator(mode="after")
    def _order(self) -> ReferenceRange:
        if self.start.tzinfo is None:
            self.start = self.start.replace(tzinfo=UTC)
        if self.end.tzinfo is None:
            self.end = self.end.replace(tzinfo=UTC)
        if self.end <= self.start:
            raise ValueError("reference end must be after its start")
        return self


class ModelSettings(BaseModel):
    """Settings shared by create and update."""

    model_config = ConfigDict(extra="forbid")

    threshold: float | None = Field(None, ge=0.0, le=1.0)
    label_delay_days: float | None = Field(None, gt=0, le=3650)
    min_coverage: float | None = Field(None, ge=0.0, le=1.0)
    negative_after_days: float | None = Field(None, gt=0, le=3650)
    segment_keys: list[str] | None = Field(None, max_length=8)
    reference: ReferenceRange | None = None
    time_zone: str | None = Field(None, max_length=64)
    # null on PATCH: back to the default
    keep_raw_days: float | None = Field(None, gt=0, le=36500, allow_inf_nan=False)

    @field_validator("time_zone")
    @classmethod
    def _zone(cls, value: str | None) -> str | None:
        if value is not None:
            problem = zone_problem(value)
            if problem is not None:
                raise ValueError(problem)
        return value

    @field_validator("segment_keys")
    @classmethod
    def _keys(cls, value: list[str] | None) -> list[str] | None:
        if value is not None:
            for key in value:
                if not key or len(key) > 64 or ":" in key:
                    raise ValueError("segment keys are 1-64 characters without ':'")
        return value


class ModelCreate(ModelSettings):
    """POST /v1/models."""

    name: str = Field(pattern=NAME_PATTERN)
    kind: Literal["binary", "multiclass"] = "binary"
    # "lake": rollup rows are uploaded (PUT .../rollups) instead of predictions and labels
    source: Literal["http", "lake"] = "http"
    classes: list[str | int] | None = None
    positive: str | int | None = None

    @model_validator(mode="after")
    def _check(self) -> ModelCreate:
        classes = _classes(self.classes)
        if self.kind == "binary":
            classes = classes or ["0", "1"]
            if len(classes) != 2:
                raise ValueError("a binary model has exactly two classes")
            positive = str(self.positive) if self.positive is not None else classes[-1]
            if positive not in classes:
                raise ValueError(f"positive must be one of the classes {classes}")
            self.positive = positive
        else:
            if classes is None:
                raise ValueError("a multiclass model needs its classes")
            if self.positive is not None:
                raise ValueError("a multiclass model has no positive class")
        self.classes = list(classes)
        return self


class ModelUpdate(ModelSettings):
    """PATCH /v1/models/{model}: only the given fields change."""


class ModelCounts(BaseModel):
    """What is stored for a model."""

    predictions: int
    labelled: int
    pending_labels: int


class ModelRead(BaseModel):
    """A model as the API answers it."""

    name: str
    kind: str
    classes: list[str]
    positive: str | None
    threshold: float
    label_delay_days: float
    min_coverage: float
    negative_after_days: float | None
    segment_keys: list[str] | None
    reference: dict[str, str] | None = None
    time_zone: str = "UTC"
    keep_raw_days: float = 0.0
    keep_raw_days_default: bool = True
    source: str = "http"
    raw_kept_from: datetime | None = Field(
        None,
        description="the first UTC day whose raw rows are kept (null: none dropped yet);"
        " earlier days answer from their rollups, and predictions for them are refused",
    )
    created_at: datetime
    updated_at: datetime
    counts: ModelCounts
    first_prediction_at: datetime | None
    last_prediction_at: datetime | None


class ModelPage(BaseModel):
    """A page of models."""

    items: list[ModelRead]
    next_cursor: str | None


class KeyCreate(BaseModel):
    """POST /v1/keys."""

    model_config = ConfigDict(extra="forbid")
    scopes: list[Literal["ingest", "read", "admin"]] = Field(min_length=1)
    name: str | None = Field(None, max_length=128)


class KeyRead(BaseModel):
    """A new token: the secret is shown once."""

    id: str
    scopes: list[str]
    name: str | None
    created_at: datetime
    token: str


class KeyInfo(BaseModel):
    """A token as listed: never its secret."""

    id: str
    scopes: list[str]
    name: str | None
    created_at: datetime
    revoked_at: datetime | None


class KeyPage(BaseModel):
    """The project's tokens, oldest first."""

    items: list[KeyInfo]
    next_cursor: str | None = None


class PredictionsAnswer(BaseModel):
    """Answer to a predictions batch."""

    accepted: int
    duplicates: int


class LabelsAnswer(BaseModel):
    """Answer to a labels batch; the five counts add up to the batch size."""

    matched: int
    pending: int
    corrected: int
    unchanged: int
    expired: int = Field(
        0,
        description="labels for ids whose raw rows retention dropped (keep_raw_days):"
        " stored nowhere",
    )


class ErasedCounts(BaseModel):
    """Rows removed by an erasure, by kind."""

    predictions: int
    labels: int
    pending_labels: int


class ErasureAnswer(BaseModel):
    """Answer to DELETE /v1/models/{model}/predictions."""

    erased: ErasedCounts
    not_found: list[str]
    expired: list[str] = Field(
        default_factory=list,
        description="ids whose raw rows retention had already dropped (keep_raw_days)",
    )


class PendingRead(BaseModel):
    """A label waiting for its prediction."""

    id: str
    actual: str
    ts: datetime
    received_at: datetime
    age_hours: float
    dropped_after: datetime


class PendingPage(BaseModel):
    """A page of a model's pending labels, in the order they first arrived."""

    items: list[PendingRead]
    next_cursor: str | None
