"""Alert rules of a model: create, read, list, change, retire."""

from __future__ import annotations

import secrets
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.alerts import catalog
from belated.alerts.schemas import DEFAULTS, RuleRead, check_rule
from belated.alerts.tables import Rule
from belated.clock import clock
from belated.errors import Conflict, NotFound, invalid_field
from belated.store import tag_names
from belated.store.tables import ModelRow
from belated.timeutil import iso, to_utc
from belated.zones import DEFAULT_ZONE, zone

SETTING_KEYS = (
    "threshold",
    "mode",
    "tolerance",
    "alpha",
    "min_support",
    "baseline",
    "segment_by",
    "clear_after",
    "low",
    "high",
    "max_silence_hours",
    "early",
)


def rule_read(rule: Rule, model_name: str, *, now: datetime | None = None) -> RuleRead:
    """A rule as the API answers it (muted as of `now`, the clock by default)."""
    cfg = {**DEFAULTS, **{k: v for k, v in rule.settings.items() if v is not None}}
    at = now or clock.now()
    muted = rule.muted_until is not None and to_utc(rule.muted_until) > at
    return RuleRead(
        id=rule.id,
        model=model_name,
        kind=rule.kind,
        measure=rule.measure,
        granularity=rule.granularity,
        muted_until=rule.muted_until and to_utc(rule.muted_until),
        muted=muted,
        created_at=to_utc(rule.created_at),
        updated_at=to_utc(rule.updated_at),
        retired_at=rule.retired_at and to_utc(rule.retired_at),
        **{k: cfg[k] for k in SETTING_KEYS},
    )


def _settings(fields: dict[str, Any], time_zone: str) -> dict[str, Any]:
    """The stored settings of a rule. A baseline's start or end given without an offset (a
    bare date, or a wall time) is read in the model's zone, as GET /metrics reads them, and
    stored as the UTC instant it names."""
    out = {k: fields[k] for k in SETTING_KEYS if k in fields}
    if isinstance(out.get("baseline"), dict):
        tz = zone(time_zone)
        out["baseline"] = {
            k: (iso(v if v.tzinfo else v.replace(tzinfo=tz)) if isinstance(v, datetime) else v)
            for k, v in out["baseline"].items()
            if v is not None
        }
    return out


def check_tag_keys(
    *, session: Session, model: ModelRow, segment_by: str | None, measure: str | None
) -> None:
    """Refuse a rule on a tag key the model has never seen (`segment_by`, `tag_psi:<key>`):
    a 422 naming the field and the closest known keys."""
    if segment_by is not None and (why := tag_names.unknown_rule_key(session, model, segment_by)):
        raise invalid_field("segment_by", why)
    if measure is not None and measure.startswith(TAG_PSI):
        key = measure[len(TAG_PSI) :]
        if why := tag_names.unknown_rule_key(session, model, key):
            raise invalid_field("measure", why)


TAG_PSI = "tag_psi:"


def create_rule(
    *, session: Session, model: ModelRow, fields: dict[str, Any], now: datetime | None = None
) -> Rule:
    """Create a rule on a model, stamped `now` (the clock by default)."""
    if why := catalog.check_threshold(
        fields["kind"], fields.get("measure"), fields.get("threshold")
    ):
        raise invalid_field("threshold", why)
    check_tag_keys(
        session=session,
        model=model,
        segment_by=fields.get("segment_by"),
        measure=fields.get("measure"),
    )
    stamp = now or clock.now()
    rule = Rule(
        id="rul_" + secrets.token_hex(8),
        model_id=model.id,
        kind=fields["kind"],
        measure=fields.get("measure"),
        granularity=fields.get("granularity") or "day",
        settings=_settings(fields, model.time_zone or DEFAULT_ZONE),
        muted_until=fields.get("muted_until"),
        created_at=stamp,
        updated_at=stamp,
    )
    session.add(rule)
    session.flush()
    return rule


def get_rule(*, session: Session, model: ModelRow, rule_id: str) -> Rule:
    """A rule of the model; NotFound otherwise."""
    rule = session.get(Rule, rule_id)
    if rule is None or rule.model_id != model.id:
        raise NotFound("rule", rule_id, where=f"on model {model.name!r}")
    return rule


def list_rules(*, session: Session, model: ModelRow, retired: bool = False) -> list[Rule]:
    """The model's rules, oldest first; retired ones only when asked for (`retired`)."""
    query = select(Rule).where(Rule.model_id == model.id)
    if not retired:
        query = query.where(Rule.retired_at.is_(None))
    return list(session.scalars(query.order_by(Rule.created_at, Rule.id)))


def update_rule(
    *, session: Session, rule: Rule, fields: dict[str, Any], now: datetime | None = None
) -> Rule:
    """Change a rule (stamped `now`); the result must still be a rule that can work, and a
    retired rule cannot be changed."""
    if rule.retired_at is not None:
        raise Conflict(f"the rule {rule.id!r} is retired; create a new rule instead")
    model = session.get(ModelRow, rule.model_id)
    time_zone = (model.time_zone if model is not None else None) or DEFAULT_ZONE
    merged = {**rule.settings, **_settings(fields, time_zone)}
    measure = fields.get("measure", rule.measure)
    try:
        check_rule(rule.kind, {**merged, "measure": measure})
    except ValueError as exc:
        text = str(exc)
        field = "early" if text.startswith("early:") else "measure" if "measure" in text else "rule"
        raise invalid_field(field, text) from None
    if why := catalog.check_threshold(rule.kind, measure, merged.get("threshold")):
        raise invalid_field("threshold", why)
    if model is not None and ("segment_by" in fields or "measure" in fields):
        check_tag_keys(
            session=session,
            model=model,
            segment_by=fields.get("segment_by"),
            measure=fields.get("measure"),
        )
    rule.settings = merged
    rule.measure = measure
    if "granularity" in fields and fields["granularity"]:
        rule.granularity = fields["granularity"]
    if "muted_until" in fields:
        rule.muted_until = fields["muted_until"]
    rule.updated_at = now or clock.now()
    session.flush()
    return rule


def retire_rule(*, session: Session, rule: Rule, now: datetime | None = None) -> Rule:
    """Retire a rule (what deleting it does): it is no longer evaluated or listed, and its
    alerts and breaches are kept, in the state they were in. Retiring twice changes nothing."""
    if rule.retired_at is None:
        rule.retired_at = now or clock.now()
        session.flush()
    return rule
