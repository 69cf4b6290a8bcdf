"""API schemas of markers: dated notes on a model's timeline."""

from __future__ import annotations

from datetime import UTC, datetime

from pydantic import BaseModel, ConfigDict, Field, field_validator

from belated.timeutil import parse_ts

MARKER_TEXT_MAX = 500
EARLIEST = datetime(1970, 1, 1, tzinfo=UTC)
LATEST = datetime(2200, 1, 1, tzinfo=UTC)


class MarkerCreate(BaseModel):
    """POST /v1/models/{model}/markers: what happened to the model, and when."""

    model_config = ConfigDict(extra="forbid")
    at: datetime = Field(description="When it happened (RFC 3339; without an offset, UTC).")
    text: str = Field(min_length=1, max_length=MARKER_TEXT_MAX)

    @field_validator("at", mode="before")
    @classmethod
    def _time(cls, value: object) -> datetime:
        if not isinstance(value, str | datetime):
            raise ValueError("an RFC 3339 time such as 2026-10-01T08:00:00Z")
        try:
            at = parse_ts(value)
        except (ValueError, TypeError, OverflowError):
            raise ValueError("an RFC 3339 time such as 2026-10-01T08:00:00Z") from None
        if not EARLIEST <= at < LATEST:
            raise ValueError("a time between 1970 and 2200")
        return at

    @field_validator("text")
    @classmethod
    def _readable(cls, value: str) -> str:
        if "\x00" in value:
            raise ValueError("a marker must not contain NUL characters")
        if not value.strip():
            raise ValueError("a marker must say something (it is blank)")
        return value.strip()


class MarkerRead(BaseModel):
    """A marker as the API answers it."""

    id: str
    model: str
    at: datetime
    text: str
    who: str
    created_at: datetime


class MarkerPage(BaseModel):
    """The model's markers, oldest first (one page: a timeline holds few)."""

    items: list[MarkerRead]
    next_cursor: str | None = None
