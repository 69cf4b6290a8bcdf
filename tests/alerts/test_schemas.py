"""Rule settings: built once from the validated schema, the same from a stored row."""

from __future__ import annotations

import secrets
from datetime import UTC, datetime
from typing import Any

import pytest

from belated.alerts import rules
from belated.alerts.evaluate import settings_of
from belated.alerts.schemas import (
    DEFAULTS,
    BaselineSettings,
    RuleCreate,
    RuleSettings,
    settings_from,
)
from belated.alerts.tables import Rule
from belated.api.schemas import ModelCreate
from belated.store import keys, model_registry
from belated.store.db import transaction


def test_defaults_are_the_settings_defaults() -> None:
    bare = settings_from(RuleCreate(kind="traffic", low=1))
    assert bare == RuleSettings(kind="traffic", low=1.0)
    shown = {k: getattr(bare, k) for k in DEFAULTS if k not in ("baseline", "low")}
    assert shown == {k: v for k, v in DEFAULTS.items() if k not in ("baseline", "low")}
    assert DEFAULTS["baseline"] == {"windows": bare.baseline.windows}


@pytest.mark.parametrize(
    "fields",
    [
        {"kind": "drop", "measure": "recall", "tolerance": 0.02, "segment_by": "region"},
        {
            "kind": "drop",
            "measure": "precision",
            "granularity": "week",
            "baseline": {"start": "2026-10-01T00:00:00Z", "end": "2026-10-15T00:00:00Z"},
        },
        {"kind": "stall", "threshold": 0.5, "max_silence_hours": 12, "alpha": 0.01},
    ],
)
def test_a_stored_rule_reads_back_as_the_settings_it_was_created_with(
    sessions: Any, frozen: Any, fields: dict[str, Any]
) -> None:
    body = RuleCreate(**fields)
    with transaction(sessions) as session:
        project = keys.get_or_create_project(session=session, name="t-" + secrets.token_hex(5))
        model = model_registry.create(
            session=session,
            project_id=project.id,
            fields=ModelCreate(name="returns-v2", segment_keys=["region"]).model_dump(),
        )
        rule = rules.create_rule(
            session=session, model=model, fields=body.model_dump(exclude_unset=True)
        )
        rule_id = rule.id
    with transaction(sessions) as session:  # a fresh read of the JSON row
        row = session.get(Rule, rule_id)
        assert row is not None
        stored = settings_of(row)
    assert stored == settings_from(body)
    if "start" in fields.get("baseline", {}):
        assert stored.baseline == BaselineSettings(
            start=datetime(2026, 10, 1, tzinfo=UTC), end=datetime(2026, 10, 15, tzinfo=UTC)
        )
        assert stored.baseline.fixed
