"""The sentence each rule kind says about its alert, and the link to the model's page."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import pytest

from belated.alerts import explain
from belated.alerts.schemas import RuleCreate, settings_from

NOV = {"start": "2026-11-01T00:00:00Z", "end": "2026-11-08T00:00:00Z", "value": 0.7412}


def _rule(**fields: Any) -> Any:
    return settings_from(RuleCreate.model_validate(fields))


@pytest.mark.parametrize(
    ("fields", "baseline", "segment", "said"),
    [
        (
            {"kind": "drop", "measure": "recall", "tolerance": 0.05, "alpha": 0.01},
            NOV,
            "region:north",
            "Recall fell more than 0.05 under its baseline of 0.741 (1–7 Nov), at α = 0.01, "
            "in region north.",
        ),
        (
            {"kind": "drop", "measure": "precision", "baseline": {"windows": 14}},
            None,
            "",
            "Precision fell under its baseline (the 14 days before), at α = 0.05.",
        ),
        (
            {"kind": "floor", "measure": "recall", "threshold": 0.7, "mode": "confident"},
            None,
            "channel:web",
            "Recall fell under 0.7, even at the upper end of its 90% interval, in channel web.",
        ),
        (
            {"kind": "shift", "measure": "positive_rate", "threshold": 0.05, "alpha": 0.001},
            {**NOV, "value": 0.21, "end": "2026-12-01T00:00:00Z"},
            "",
            "The predicted positive rate moved by 0.05 or more from its baseline of 0.21 "
            "(1–30 Nov), at α = 0.001.",
        ),
        (
            {"kind": "shift", "measure": "score_psi", "threshold": 0.1},
            {"start": "2026-10-28T00:00:00Z", "end": "2026-11-04T00:00:00Z"},
            "",
            "The score distribution shifted from its baseline (28 Oct–3 Nov): PSI of 0.1 or more.",
        ),
        (
            {"kind": "shift", "measure": "tag_psi:channel", "threshold": 0.2},
            NOV | {"value": None},
            "",
            "The mix of channel values shifted from its baseline (1–7 Nov): PSI of 0.2 or more.",
        ),
        ({"kind": "traffic", "low": 200}, None, "", "Fewer than 200 predictions arrived in a day."),
        (
            {"kind": "traffic", "low": 200, "high": 5000, "granularity": "hour"},
            None,
            "",
            "Predictions per hour fell outside 200–5000.",
        ),
        ({"kind": "stall", "max_silence_hours": 48}, None, "", "No label arrived for 48 hours."),
        (
            {"kind": "stall", "threshold": 0.5},
            None,
            "",
            "Label coverage of days older than the label delay fell under 0.5.",
        ),
    ],
)
def test_each_kind_says_what_fired(
    fields: dict[str, Any], baseline: dict[str, Any] | None, segment: str, said: str
) -> None:
    assert explain.sentence(_rule(**fields), baseline, segment) == said


def test_periods_read_as_people_write_them() -> None:
    def at(*a: int) -> datetime:
        return datetime(*a, tzinfo=UTC)

    assert explain.period(at(2026, 11, 1), at(2026, 11, 2), "day") == "1 Nov"
    assert explain.period(at(2025, 12, 29), at(2026, 1, 5), "week") == "29 Dec 2025–4 Jan 2026"
    assert explain.period(at(2026, 11, 1, 3), at(2026, 11, 1, 9), "hour") == "1 Nov 03:00–09:00"


def test_the_link_opens_the_model_page_around_the_first_breached_window() -> None:
    started = datetime(2026, 11, 11, tzinfo=UTC)
    latest = datetime(2026, 11, 14, tzinfo=UTC)
    assert explain.link("returns-v2", "day", "region:north", started, latest) == (
        "/models/returns-v2?granularity=day&start=2026-10-28T00%3A00%3A00Z"
        "&end=2026-11-15T00%3A00%3A00Z&segment=region%3Anorth"
    )
    assert explain.link(
        "returns-v2", "day", None, None, None, public_url="https://belated.example/"
    ) == ("https://belated.example/models/returns-v2?granularity=day")
