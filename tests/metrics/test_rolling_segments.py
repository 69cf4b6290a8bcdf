"""Rolling windows and segments against scikit-learn on the union or subset of their rows.

rolling=N merges a window with the N-1 before it, reaching before `start`; a segment
`key:value` from rollups must equal a recomputation on the rows carrying that tag, and two
segments at once (answered from raw rows) the rows carrying both.
"""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

import numpy as np
import pytest
from sqlalchemy import Engine

from belated.app import create_app
from belated.config import Settings
from belated.store import refresh
from tests.conftest import Tenant, make_tenant
from tests.support import create_model, rows, stamp
from tests.support.datasets import (
    NOW,
    REGIONS,
    START,
    STEPS,
    align,
    breast_cancer,
    check_window,
    effective,
    in_range,
    ingest,
    metrics,
    settled,
    window_starts,
)

SETTINGS = {"label_delay_days": 14, "min_coverage": 0.8}


def _settled_part(
    sc: object, mask: np.ndarray, labelled: np.ndarray, start: datetime, step: timedelta
) -> bool | None:
    rows_ = mask & in_range(sc.ts, start, start + step)  # type: ignore[attr-defined]
    return settled(
        int(rows_.sum()),
        int((rows_ & labelled).sum()),
        start + step,
        NOW,
        SETTINGS["min_coverage"],
        SETTINGS["label_delay_days"],
    )


@pytest.mark.parametrize(
    ("granularity", "n", "offset"), [("day", 3, 5), ("week", 2, 1), ("hour", 24, 24 * 6)]
)
def test_rolling_windows_equal_the_union_of_their_rows(
    tenant: Tenant, engine: Engine, frozen: None, granularity: str, n: int, offset: int
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    ingest(tenant.client, model.name, sc, NOW)
    labelled, y, implied = effective(sc, NOW)
    step = STEPS[granularity]
    base = START if granularity != "week" else START - timedelta(days=START.weekday())
    start = base + offset * step  # the first windows reach back before `start`
    end = start + (40 if granularity == "hour" else 12) * step
    answer = metrics(
        tenant.client,
        model.name,
        granularity=granularity,
        rolling=n,
        start=stamp(start),
        end=stamp(end),
    )
    assert answer["rolling"] == n
    starts = window_starts(granularity, start, end)
    # a rolling window spans from its first part's start to its last part's end
    assert [w["start"] for w in answer["windows"]] == [stamp(s - (n - 1) * step) for s in starts]
    assert [w["end"] for w in answer["windows"]] == [stamp(s + step) for s in starts]
    everything = np.ones(len(sc.pids), bool)
    for w, s in zip(answer["windows"], starts, strict=True):
        union = in_range(sc.ts, s - (n - 1) * step, s + step)
        check_window(w, sc, union, labelled, y, implied, full=granularity != "hour")
        parts = [_settled_part(sc, everything, labelled, s - k * step, step) for k in range(n)]
        if None not in parts:
            assert w["settled"] is all(parts)
    # the first window holds rows from before `start`
    assert answer["windows"][0]["predictions"] > int(in_range(sc.ts, start, start + step).sum())


def test_one_segment_from_rollups_equals_the_rows_with_that_tag(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    ingest(tenant.client, model.name, sc, NOW)
    labelled, y, implied = effective(sc, NOW)
    start, end = START, START + timedelta(days=25)
    for key, value, tagged in (
        ("region", "north", sc.region == "north"),
        ("region", "west", sc.region == "west"),
        ("channel", "app", sc.channel == "app"),
    ):
        answer = metrics(
            tenant.client,
            model.name,
            granularity="day",
            start=stamp(start),
            end=stamp(end),
            **{f"tag.{key}": value},
        )
        assert answer["tags"] == {key: value}
        assert sum(w["predictions"] for w in answer["windows"]) == int(tagged.sum())
        for w, s in zip(answer["windows"], window_starts("day", start, end), strict=True):
            check_window(w, sc, tagged & in_range(sc.ts, s, s + STEPS["day"]), labelled, y, implied)
            part = _settled_part(sc, tagged, labelled, s, STEPS["day"])
            if part is not None:  # a segment is settled by its own coverage
                assert w["settled"] is part
        # the answer came from rollups: the segment has rollup rows of its own
        assert (
            rows(
                engine,
                "SELECT count(*) FROM rollups WHERE model_id = :m AND level = 'd'"
                " AND seg_key = :k AND seg_value = :v",
                m=model.id,
                k=key,
                v=value,
            )[0][0]
            > 0
        )
    north = sc.region == "north"
    for granularity, rolling, lo, hi in (
        ("day", 3, start, end),
        ("hour", 6, START + timedelta(days=4), START + timedelta(days=6)),
    ):
        step = STEPS[granularity]
        answer = metrics(
            tenant.client,
            model.name,
            granularity=granularity,
            rolling=rolling,
            start=stamp(lo),
            end=stamp(hi),
            **{"tag.region": "north"},
        )
        for w, s in zip(answer["windows"], window_starts(granularity, lo, hi), strict=True):
            union = north & in_range(sc.ts, s - (rolling - 1) * step, s + step)
            check_window(w, sc, union, labelled, y, implied, full=granularity == "day")


def test_two_segments_at_once_equal_the_rows_with_both_tags(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    ingest(tenant.client, model.name, sc, NOW)
    labelled, y, implied = effective(sc, NOW)
    start, end = START, START + timedelta(days=25)
    both = (sc.region == "south") & (sc.channel == "web")
    for granularity, rolling in (("day", 1), ("week", 1), ("day", 2)):
        answer = metrics(
            tenant.client,
            model.name,
            granularity=granularity,
            rolling=rolling,
            start=stamp(start),
            end=stamp(end),
            **{"tag.region": "south", "tag.channel": "web"},
        )
        step = STEPS[granularity]
        aligned = window_starts(granularity, align(start, granularity), align(end, granularity))
        assert [w["start"] for w in answer["windows"]] == [
            stamp(s - (rolling - 1) * step) for s in aligned
        ]
        for w, s in zip(answer["windows"], aligned, strict=True):
            union = both & in_range(sc.ts, s - (rolling - 1) * step, s + step)
            check_window(w, sc, union, labelled, y, implied)
    # a tag value nobody carries is a typo, not an empty segment: refused, naming the values
    r = tenant.client.get(
        f"/v1/models/{model.name}/metrics",
        params={"start": stamp(start), "end": stamp(end), "tag.region": "nowhere"},
    )
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "tag.region"
    assert "nowhere" in r.json()["detail"] and "north" in r.json()["detail"]


def test_values_over_the_cap_roll_up_as_other_and_still_answer_exactly(
    engine: Engine, sessions: Any, settings: Settings, frozen: None
) -> None:
    """BELATED_MAX_SEGMENT_VALUES=2: two regions get rollups, the rest share '(other)';
    every region still answers exactly (the others from raw rows), and a rebuild keeps the
    same choice."""
    from fastapi.testclient import TestClient

    app = create_app(
        settings.model_copy(update={"max_segment_values": 2}), engine=engine, jobs=False
    )
    with TestClient(app, base_url="http://testserver") as client:
        tenant = make_tenant(sessions, client)
        sc = breast_cancer()
        model = create_model(tenant, engine, **SETTINGS)
        ingest(client, model.name, sc, NOW)
        labelled, y, implied = effective(sc, NOW)
        start, end = START, START + timedelta(days=25)
        for region in REGIONS:
            answer = metrics(
                client, model.name, start=stamp(start), end=stamp(end), **{"tag.region": region}
            )
            tagged = sc.region == region
            for w, s in zip(answer["windows"], window_starts("day", start, end), strict=True):
                check_window(
                    w,
                    sc,
                    tagged & in_range(sc.ts, s, s + STEPS["day"]),
                    labelled,
                    y,
                    implied,
                    full=False,
                )
        admitted = {
            r[0]
            for r in rows(
                engine,
                "SELECT value FROM segment_values WHERE model_id = :m AND key = 'region'",
                m=model.id,
            )
        }
        assert len(admitted) == 2
        other = ~np.isin(sc.region, sorted(admitted))
        before = rows(
            engine,
            "SELECT start, n_pred FROM rollups WHERE model_id = :m AND"
            " level = 'd' AND seg_key = 'region' AND seg_value = '(other)'"
            " ORDER BY start",
            m=model.id,
        )
        assert sum(n for _, n in before) == int(other.sum())
        refresh.rebuild(sessions, max_values=2, model_id=model.id)
        after = rows(
            engine,
            "SELECT start, n_pred FROM rollups WHERE model_id = :m AND"
            " level = 'd' AND seg_key = 'region' AND seg_value = '(other)'"
            " ORDER BY start",
            m=model.id,
        )
        assert [tuple(r) for r in after] == [tuple(r) for r in before]
