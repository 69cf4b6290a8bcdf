"""API schemas of rules, alerts and webhooks."""

from __future__ import annotations

from dataclasses import dataclass, fields
from datetime import datetime
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from belated.alerts import catalog
from belated.timeutil import to_utc

Kind = Literal["floor", "drop", "shift", "stall", "traffic"]
Granularity = Literal["hour", "day", "week"]
Mode = Literal["point", "confident"]
BASELINE_WINDOWS = 7  # trailing windows of a baseline that names neither windows nor a range


@dataclass(frozen=True, kw_only=True)
class BaselineSettings:
    """The trailing `windows` windows, or the fixed range [start, end) when start is set.

    `windows` keeps its default under a fixed range: the evaluation still sizes its
    lookback by it.
    """

    windows: int = BASELINE_WINDOWS
    start: datetime | None = None
    end: datetime | None = None

    @property
    def fixed(self) -> bool:
        """Whether the baseline is a fixed range rather than trailing windows."""
        return self.start is not None and self.end is not None


@dataclass(frozen=True, kw_only=True)
class RuleSettings:
    """A rule's effective settings with every default filled in: what decide and evaluate
    read. The defaults declared here are the only ones (DEFAULTS below derives from them)."""

    kind: Kind
    measure: str | None = None
    granularity: Granularity = "day"
    threshold: float | None = None
    mode: Mode = "point"
    tolerance: float = 0.0
    alpha: float = 0.05
    min_support: int = 30
    baseline: BaselineSettings = BaselineSettings()
    segment_by: str | None = None
    clear_after: int = 1
    low: float | None = None
    high: float | None = None
    max_silence_hours: float | None = None
    early: bool = False


class Baseline(BaseModel):
    """The trailing N windows before the evaluated one, or a fixed range."""

    model_config = ConfigDict(extra="forbid")
    windows: int | None = Field(None, ge=1, le=365)
    start: datetime | None = None
    end: datetime | None = None

    @model_validator(mode="after")
    def _one(self) -> Baseline:
        fixed = self.start is not None or self.end is not None
        if fixed and self.windows is not None:
            raise ValueError("give windows or start/end, not both")
        if fixed and (
            self.start is None or self.end is None or to_utc(self.start) >= to_utc(self.end)
        ):
            # without an offset a time is the model's wall time, not known here: compared
            # as UTC, and aligned in the model's zone when the rule is stored
            raise ValueError("a fixed baseline needs start before end")
        if not fixed and self.windows is None:
            self.windows = BASELINE_WINDOWS
        return self


class RuleFields(BaseModel):
    """Fields shared by create and update."""

    model_config = ConfigDict(extra="forbid")
    measure: str | None = None
    granularity: Granularity | None = None
    threshold: float | None = None
    mode: Mode | None = None
    tolerance: float | None = Field(None, ge=0, le=1)
    alpha: float | None = Field(None, gt=0, lt=1)
    min_support: int | None = Field(None, ge=0)
    baseline: Baseline | None = None
    segment_by: str | None = Field(None, min_length=1, max_length=64)
    clear_after: int | None = Field(None, ge=1, le=100)
    low: float | None = Field(None, ge=0)
    high: float | None = Field(None, ge=0)
    max_silence_hours: float | None = Field(None, gt=0)
    muted_until: datetime | None = None
    # also decide on unsettled windows' projected measures (alerts say "early": true)
    early: bool | None = None


# the settings' defaults as the API shows them (a trailing baseline as {"windows": N})
DEFAULTS: dict[str, Any] = {
    f.name: ({"windows": BASELINE_WINDOWS} if f.name == "baseline" else f.default)
    for f in fields(RuleSettings)
    if f.name not in ("kind", "measure")
}


class RuleCreate(RuleFields):
    """POST /v1/models/{model}/rules."""

    kind: Kind

    @model_validator(mode="after")
    def _works(self) -> RuleCreate:
        check_rule(self.kind, self.model_dump(exclude_unset=True))
        return self


def settings_from(rule: RuleCreate) -> RuleSettings:
    """The effective settings of a validated rule: what it gives, defaults for the rest."""
    given: dict[str, Any] = {
        f.name: getattr(rule, f.name)
        for f in fields(RuleSettings)
        if f.name != "baseline" and getattr(rule, f.name) is not None
    }
    b = rule.baseline
    if b is not None:
        given["baseline"] = BaselineSettings(
            windows=BASELINE_WINDOWS if b.windows is None else b.windows,
            start=None if b.start is None else to_utc(b.start),
            end=None if b.end is None else to_utc(b.end),
        )
    return RuleSettings(**given)


def stored_settings(
    kind: str, measure: str | None, granularity: str, settings: dict[str, Any] | None
) -> RuleSettings:
    """A stored rule's effective settings: its JSON row validated again by the API schema."""
    fields = {**(settings or {}), "kind": kind, "measure": measure, "granularity": granularity}
    return settings_from(RuleCreate.model_validate(fields))


def check_rule(kind: str, fields: dict[str, Any]) -> None:
    """Refuse a rule that cannot work (raised as ValueError, reported as 422)."""
    merged = {**DEFAULTS, **{k: v for k, v in fields.items() if v is not None}}
    reason = catalog.check(kind, merged.get("measure"), merged.get("mode"))
    if reason:
        raise ValueError(reason)
    if merged["early"] and (why := catalog.check_early(kind, merged.get("measure"))):
        raise ValueError(f"early: {why}")
    if kind == "floor" and merged["threshold"] is None:
        raise ValueError("a floor rule needs a threshold")
    if kind == "shift" and merged["threshold"] is None:
        raise ValueError("a shift rule needs a threshold (minimum change, or PSI)")
    if kind == "traffic" and merged["low"] is None and merged["high"] is None:
        raise ValueError("a traffic rule needs low, high or both")
    if (
        kind == "traffic"
        and merged["low"] is not None
        and merged["high"] is not None
        and merged["low"] > merged["high"]
    ):
        raise ValueError("low must not exceed high")
    if kind == "stall" and merged["threshold"] is None and merged["max_silence_hours"] is None:
        raise ValueError("a stall rule needs a coverage threshold or max_silence_hours")
    if kind == "stall" and merged["threshold"] is not None and not 0 <= merged["threshold"] <= 1:
        raise ValueError("a stall threshold is a coverage between 0 and 1")


class RuleUpdate(RuleFields):
    """PATCH /v1/models/{model}/rules/{id}."""


class RuleRead(BaseModel):
    """A rule as the API answers it."""

    id: str
    model: str
    kind: str
    measure: str | None
    granularity: str
    threshold: float | None
    mode: str
    tolerance: float
    alpha: float
    min_support: int
    baseline: dict[str, Any]
    segment_by: str | None
    clear_after: int
    low: float | None
    high: float | None
    max_silence_hours: float | None
    early: bool
    muted_until: datetime | None
    muted: bool
    created_at: datetime
    updated_at: datetime
    retired_at: datetime | None = None


NOTE_MAX = 2000  # characters of one note


class NoteCreate(BaseModel):
    """POST /v1/alerts/{id}/note: what a person has to say about an alert."""

    model_config = ConfigDict(extra="forbid")
    text: str = Field(min_length=1, max_length=NOTE_MAX)

    @field_validator("text")
    @classmethod
    def _readable(cls, value: str) -> str:
        if "\x00" in value:
            raise ValueError("a note must not contain NUL characters")
        if not value.strip():
            raise ValueError("a note must say something (it is blank)")
        return value.strip()


class WebhookCreate(BaseModel):
    """POST /v1/webhooks."""

    model_config = ConfigDict(extra="forbid")
    url: str = Field(min_length=8, max_length=2048)
