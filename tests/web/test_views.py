"""The model page's views of change, over real HTTP (uvicorn on loopback): the range it opens
on, alert marks on every chart, the segment table (sorted, breaches marked), the β control
and CSV downloads.

Data: tests/support/regions.py (a north-only precision drop from day 21). The segment
table's settled numbers are checked against scikit-learn's precision_score, recall_score and
fbeta_score (Pedregosa et al., 2011, "Scikit-learn: Machine Learning in Python", JMLR 12) on
the same orders; counts are recounted from the orders sent.
"""

from __future__ import annotations

import csv
import io
import re
from collections.abc import Iterator
from datetime import timedelta
from typing import Any

import httpx
import pytest
from sklearn.metrics import fbeta_score, precision_score, recall_score
from sqlalchemy import Engine

from belated.clock import clock
from tests.conftest import LiveServer, Tenant, make_tenant
from tests.support import regions
from tests.support.builders import stamp
from tests.support.regions import FIRST_DAY, NOW, THRESHOLD


@pytest.fixture()
def shop(live: LiveServer, sessions: Any, engine: Engine) -> Iterator[tuple[Tenant, str]]:
    """A tenant over real HTTP with the regions shop sent and a weekly precision floor per
    region evaluated at NOW; the clock held at NOW."""
    clock.set(NOW)
    with httpx.Client(base_url=live.url, timeout=60) as http:
        tenant = make_tenant(sessions, http)
        name = regions.send(tenant, engine, regions.orders())
        regions.raise_north(tenant, sessions, name)
        yield tenant, name
    clock.set(None)


def _page(tenant: Tenant, path: str, **params: Any) -> str:
    r = tenant.client.get(path, params=params, headers=tenant.headers("read"))
    assert r.status_code == 200, r.text[:2000]
    return r.text


def _shown(html: str) -> tuple[str, str]:
    found = re.search(r'id="shown" data-start="([^"]+)" data-end="([^"]+)"', html)
    assert found
    return found.group(1), found.group(2)


def test_the_page_opens_on_the_baselines_to_now_and_weeks_start_with_data(
    shop: tuple[Tenant, str], engine: Engine
) -> None:
    tenant, name = shop
    # daily: from the rule's baseline start (day 7) to the end of NOW's day
    start, end = _shown(_page(tenant, f"/models/{name}"))
    assert start == (FIRST_DAY + timedelta(days=7)).isoformat()
    assert end == (FIRST_DAY + timedelta(days=41)).isoformat()
    # weekly: from the first week with data (FIRST_DAY is a Monday), not 30 weeks back
    start, _ = _shown(_page(tenant, f"/models/{name}", granularity="week"))
    assert start == FIRST_DAY.isoformat()
    # a chosen range is kept as chosen
    start, _ = _shown(_page(tenant, f"/models/{name}", start="2026-05-20"))
    assert start.startswith("2026-05-20")


def test_without_rules_the_range_starts_at_the_first_prediction_at_most_120_days_back(
    live: LiveServer, sessions: Any, engine: Engine
) -> None:
    clock.set(NOW)
    with httpx.Client(base_url=live.url, timeout=60) as http:
        tenant = make_tenant(sessions, http)
        name = regions.send(tenant, engine, regions.orders()[:50])  # days 0 and 1 only
        start, _ = _shown(_page(tenant, f"/models/{name}"))
        assert start == FIRST_DAY.isoformat()
        old = NOW - timedelta(days=200)
        r = http.post(
            f"/v1/models/{name}/predictions",
            json={"predictions": [{"id": "old-1", "ts": stamp(old), "score": 0.2}]},
        )
        assert r.status_code == 200, r.text
        start, end = _shown(_page(tenant, f"/models/{name}"))
        assert start == (FIRST_DAY + timedelta(days=41 - 120)).isoformat()
        # a window with a prediction and no label says so, in the singular
        r = http.post(
            f"/v1/models/{name}/predictions",
            json={"predictions": [{"id": "new-1", "ts": stamp(NOW), "score": 0.7}]},
        )
        assert r.status_code == 200, r.text
        html = _page(tenant, f"/models/{name}")
        assert "nothing labelled yet" in html and "0 of 1 prediction labelled" in html
        assert "52 predictions stored" in html


def test_alerts_are_marked_at_their_first_breached_window_on_every_chart(
    shop: tuple[Tenant, str],
) -> None:
    tenant, name = shop
    alerts = tenant.client.get("/v1/alerts", params={"model": name}).json()["items"]
    assert {a["segment"] for a in alerts} == {"region:north"}  # the story: only the north
    first = min(b["window_start"] for b in alerts[0]["breaches"] if b["breached"])
    # the first breached week is the one the change starts in (day 21, a Monday)
    assert first.startswith((FIRST_DAY + timedelta(days=21)).date().isoformat())
    html = _page(tenant, f"/models/{name}")
    # every chart over the page's windows (the delays chart is over ages, not windows)
    charts = re.findall(r'<svg class="chart (?:line|bars)[^"]*" id="(m-[^"]+|coverage)"', html)
    assert set(charts) == {"m-precision", "m-recall", "m-fbeta", "m-positive_rate", "coverage"}
    for cid in charts:
        svg = re.search(rf'<svg [^>]*id="{cid}".*?</svg>', html, re.S)
        assert svg
        marks = re.findall(
            r'<g class="mark alert" tabindex="0"[^>]*data-window="([^"]+)"[^>]*>'
            r"<title>([^<]+)</title>",
            svg.group(0),
        )
        assert len(marks) == 1, cid
        window, text = marks[0]
        assert window == first.replace("Z", "+00:00") or window.startswith(first[:10])
        assert "region:north" in text and "alert raised" in text


def test_markers_are_marked_at_their_window_on_every_chart(shop: tuple[Tenant, str]) -> None:
    tenant, name = shop
    at = FIRST_DAY + timedelta(days=21, hours=9, minutes=30)  # the change, on a Monday
    r = tenant.client.post(
        f"/v1/models/{name}/markers",
        json={"at": stamp(at), "text": "new sofa supplier in the north"},
        headers=tenant.headers("admin"),
    )
    assert r.status_code == 201, r.text
    marker = r.json()
    html = _page(tenant, f"/models/{name}")
    charts = re.findall(r'<svg class="chart (?:line|bars)[^"]*" id="(m-[^"]+|coverage)"', html)
    assert len(charts) == 5
    for cid in charts:
        svg = re.search(rf'<svg [^>]*id="{cid}".*?</svg>', html, re.S)
        assert svg
        marks = re.findall(
            r'<g class="mark marker" tabindex="0" data-kind="marker" data-window="([^"]+)" '
            r'data-ref="([^"]+)"[^>]*><title>([^<]+)</title>',
            svg.group(0),
        )
        assert len(marks) == 1, cid
        window, ref, text = marks[0]
        assert ref == marker["id"]
        assert window.startswith(at.date().isoformat())
        assert "new sofa supplier in the north" in text
    # a marker outside the range shown is not drawn
    html = _page(
        tenant, f"/models/{name}", start=stamp(FIRST_DAY), end=stamp(at - timedelta(days=7))
    )
    assert 'class="mark marker"' not in html


def test_unsettled_windows_show_their_coverage_bounds_as_a_lighter_band(
    shop: tuple[Tenant, str],
) -> None:
    tenant, name = shop
    html = _page(tenant, f"/models/{name}")
    start, end = _shown(html)
    windows = tenant.client.get(
        f"/v1/models/{name}/metrics", params={"granularity": "day", "start": start, "end": end}
    ).json()["windows"]
    want = {
        w["start"]: w["bounds"]["precision"]
        for w in windows
        if not w["settled"] and (w.get("bounds") or {}).get("precision", {}).get("low") is not None
    }
    assert want  # the story's newest days are unsettled and partly labelled
    svg = re.search(r'<svg [^>]*id="m-precision".*?</svg>', html, re.S)
    assert svg
    band = re.search(r'<g class="bounds">(.*?)</g>', svg.group(0), re.S)
    assert band
    drawn = dict(
        re.findall(
            r'<rect [^>]*data-window="([^"]+)"><title>[^<]*coverage bounds \[([^\]]+)\]',
            band.group(1),
        )
    )
    assert set(drawn) == set(want)  # unsettled windows only, every one with bounds
    for key, text in drawn.items():
        low, high = (float(x) for x in text.split(", "))
        assert low == pytest.approx(want[key]["low"], rel=1e-5)
        assert high == pytest.approx(want[key]["high"], rel=1e-5)


def _truth(data: list[regions.Order], region: str, day: int, beta: float) -> dict[str, float]:
    chosen = [o for o in data if o.region == region and o.day == day]
    y = [o.actual for o in chosen]
    p = [int(o.score >= THRESHOLD) for o in chosen]
    return {
        "precision": precision_score(y, p),
        "recall": recall_score(y, p),
        "fbeta": fbeta_score(y, p, beta=beta),
    }


def test_the_segment_table_sorts_marks_breaches_and_downloads(
    shop: tuple[Tenant, str],
) -> None:
    tenant, name = shop
    data = regions.orders()
    html = _page(tenant, f"/models/{name}", sort="precision", order="desc", beta="2")
    table = re.search(r'<table id="segment-table" data-key="region">.*?</table>', html, re.S)
    assert table
    rows = re.findall(
        r'<tr data-value="([^"]+)"( class="breached" data-breached)?>', table.group(0)
    )
    # the latest settled day is the day before NOW's (DELAY is 12 hours)
    last = regions.DAYS - 2
    truth = {r: _truth(data, r, last, 2.0) for r in regions.REGIONS}
    assert [r for r, _ in rows] == sorted(truth, key=lambda r: -truth[r]["precision"])
    assert f"{regions.DAYS * regions.PER_DAY:,} predictions stored" in html  # 6,400
    assert {r for r, flag in rows if flag} == {"north"}
    # the sort links keep β and the key, and flip the direction of the sorted column
    assert 'href="/models/' in table.group(0) and "beta=2" in table.group(0)
    assert re.search(r'sort=precision&amp;order=asc#segments-title" data-sort="precision"', html)
    r = tenant.client.get(
        f"/models/{name}/segments.csv",
        params={"segments": "region", "beta": "2"},
        headers=tenant.headers("read"),
    )
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/csv")
    assert r.headers["content-disposition"] == f'attachment; filename="{name}-segments.csv"'
    got = {x["value"]: x for x in csv.DictReader(io.StringIO(r.text))}
    assert sorted(got) == sorted(regions.REGIONS)
    for region, row in got.items():
        mine = [o for o in data if o.region == region and o.ts >= FIRST_DAY + timedelta(days=7)]
        assert int(row["predictions"]) == len(mine)
        assert int(row["labelled"]) == sum(1 for o in mine if o.label_at <= NOW)
        for m in ("precision", "recall", "fbeta"):
            assert float(row[m]) == pytest.approx(truth[region][m], rel=1e-5), (region, m)
    assert got["north"]["breached"] and not got["south"]["breached"]


def test_beta_control_names_f_beta_and_the_url_keeps_it(shop: tuple[Tenant, str]) -> None:
    tenant, name = shop
    html = _page(tenant, f"/models/{name}", beta="0.5")
    assert 'id="beta" name="beta"' in html and 'value="0.5"' in html
    assert "F0.5 by day" in html and "F1 by day" not in html
    assert "windows.csv?granularity=day&amp;beta=0.5" in html
    r = tenant.client.get(
        f"/models/{name}/windows.csv", params={"beta": "0.5"}, headers=tenant.headers("read")
    )
    rows = list(csv.DictReader(io.StringIO(r.text)))
    day = (FIRST_DAY + timedelta(days=regions.DAYS - 2)).isoformat()
    settled = next(x for x in rows if x["start"].startswith(day[:10]))
    data = [o for o in regions.orders() if o.day == regions.DAYS - 2]
    want = fbeta_score(
        [o.actual for o in data], [int(o.score >= THRESHOLD) for o in data], beta=0.5
    )
    assert float(settled["fbeta"]) == pytest.approx(want, rel=1e-5)
    assert int(settled["predictions"]) == len(data)


@pytest.mark.parametrize(
    ("params", "field"),
    [
        ({"beta": "-1"}, "beta"),
        ({"beta": "lots"}, "beta"),
        ({"segments": "regoin"}, "segments"),
        ({"sort": "colour"}, "sort"),
        ({"order": "sideways"}, "order"),
        ({"tag.region": "nrth"}, "tag.region"),
        ({"tag.colour": "red"}, "tag.colour"),
        ({"segment": "region:north"}, "segment"),
    ],
)
def test_bad_view_parameters_are_named_once(
    shop: tuple[Tenant, str], params: dict[str, str], field: str
) -> None:
    tenant, name = shop
    r = tenant.client.get(f"/models/{name}", params=params, headers=tenant.headers("read"))
    assert r.status_code == 422
    assert r.text.count(f"{field}") >= 1
    if field == "segments":
        assert "closest stored keys: region" in r.text
    if params.get("tag.region") == "nrth":  # a typo of a value: the closest one named
        assert "north" in r.text
    body = re.search(r"<main>(.*)</main>", r.text, re.S)
    assert body
    lines = [x.strip() for x in re.sub(r"<[^>]+>", "\n", body.group(1)).splitlines() if x.strip()]
    assert len(lines) == len(set(lines))  # each message once


def test_the_drift_chart_draws_the_windows_drift_and_the_shift_rules_thresholds(
    shop: tuple[Tenant, str],
) -> None:
    tenant, name = shop
    for measure, threshold in (("score_psi", 0.25), ("positive_rate", 0.05)):
        r = tenant.client.post(
            f"/v1/models/{name}/rules",
            json={
                "kind": "shift",
                "measure": measure,
                "granularity": "day",
                "threshold": threshold,
            },
            headers=tenant.headers("admin"),
        )
        assert r.status_code == 201, r.text
    html = _page(tenant, f"/models/{name}")
    start, end = _shown(html)
    windows = tenant.client.get(
        f"/v1/models/{name}/metrics",
        params={"start": start, "end": end},
        headers=tenant.headers("read"),
    ).json()["windows"]
    for key in ("score_psi", "positive_rate_change"):
        svg = re.search(rf'<svg [^>]*id="drift-{key}".*?</svg>', html, re.S)
        assert svg, key
        drawn = {
            w: float(v)
            for v, w in re.findall(r'data-value="([^"]+)"[^>]*data-window="([^"]+)"', svg.group(0))
        }
        want = {w["start"]: w["drift"][key] for w in windows if w["drift"][key] is not None}
        assert len(want) >= 20  # the reference period leaves most days with a value
        assert drawn.keys() == want.keys()
        assert all(drawn[k] == pytest.approx(want[k], rel=1e-5) for k in want)
        refs = sorted(
            float(v) for v in re.findall(r'<g class="ref" data-value="([^"]+)"', svg.group(0))
        )
        assert refs == ([0.25] if key == "score_psi" else [-0.05, 0.0, 0.05])
    # the same values as CSV
    r = tenant.client.get(
        f"/models/{name}/drift.csv",
        params={"start": start, "end": end},
        headers=tenant.headers("read"),
    )
    rows = {x["start"]: x for x in csv.DictReader(io.StringIO(r.text))}
    assert rows.keys() == {w["start"] for w in windows}
    for w in windows:
        got = rows[w["start"]]["score_psi"]
        want_psi = w["drift"]["score_psi"]
        assert (got == "") if want_psi is None else float(got) == pytest.approx(want_psi, rel=1e-5)


def test_the_tag_picker_filters_the_page_by_the_stored_values(shop: tuple[Tenant, str]) -> None:
    tenant, name = shop
    html = _page(tenant, f"/models/{name}", **{"tag.region": "north"})
    picker = re.search(r'<select id="tag-\d+" name="tag.region"[^>]*>(.*?)</select>', html, re.S)
    assert picker
    options = re.findall(r'<option value="([^"]*)"( selected)?>', picker.group(1))
    assert [v for v, _ in options] == ["", *sorted(regions.REGIONS)]
    assert [v for v, sel in options if sel] == ["north"]
    start, end = _shown(html)
    north = tenant.client.get(
        f"/v1/models/{name}/metrics",
        params={"start": start, "end": end, "tag.region": "north"},
        headers=tenant.headers("read"),
    ).json()["windows"]
    svg = re.search(r'<svg [^>]*id="coverage".*?</svg>', html, re.S)
    assert svg
    found = re.findall(r'data-value="([^"]+)" data-window="([^"]+)"', svg.group(0))
    drawn = {w: float(v) for v, w in found}
    want = {w["start"]: w["coverage"] for w in north if w["coverage"] is not None}
    assert want and drawn.keys() == want.keys()
    assert all(drawn[k] == pytest.approx(want[k], rel=1e-5) for k in want)
    # every count of the page is north's: the whole model has more predictions
    every = tenant.client.get(
        f"/v1/models/{name}/metrics",
        params={"start": start, "end": end},
        headers=tenant.headers("read"),
    ).json()["windows"]
    assert sum(w["predictions"] for w in north) < sum(w["predictions"] for w in every)
    # links on the page keep the filter
    assert "tag.region=north" in html
