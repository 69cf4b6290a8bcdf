"""The dashboard pages through the in-process client: sign-in, refusals, and what they draw.

Data: an online furniture shop's returns model, two weeks of orders sent through the API
(tests/support/shop.py states the distributions). The numbers the charts carry are checked
against scikit-learn's precision_score, recall_score and f1_score on the same orders, the
best-F1 threshold against a brute-force search with f1_score, and a multiclass model's
accuracy against accuracy_score.
"""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from datetime import datetime, timedelta
from typing import Any

import numpy as np
import pytest
from sklearn.metrics import accuracy_score, f1_score, precision_score, recall_score
from sqlalchemy import Engine

from belated.clock import clock
from belated.store import keys
from belated.store.db import transaction
from tests.support import create_model, prediction, rows, send, stamp, three_class_scores
from tests.support.shop import (
    DAYS,
    FIRST_DAY,
    LABEL_DELAY_DAYS,
    MIN_COVERAGE,
    NOW,
    WINDOWS,
    by_day,
    raise_alert,
    send_shop,
    shop_orders,
)


def chart(html: str, chart_id: str) -> ET.Element:
    """The chart with this id, parsed (it must be well-formed)."""
    found = re.search(rf'<svg [^>]*id="{chart_id}".*?</svg>', html, re.S)
    assert found, f"no chart {chart_id}"
    return ET.fromstring(found.group(0))


def points(root: ET.Element, tag: str | None = None) -> list[ET.Element]:
    """The point elements of a chart."""
    return [
        e
        for e in root.iter()
        if "pt" in (e.get("class") or "").split() and (tag is None or e.tag == tag)
    ]


@pytest.fixture()
def frozen() -> Iterator[datetime]:
    """The process clock frozen at NOW, let go after the test."""
    clock.set(NOW)
    yield NOW
    clock.set(None)


@pytest.fixture()
def browser_client(tenant: Any) -> Any:
    """The tenant's client without its default Authorization header (cookies only)."""
    tenant.client.headers.pop("Authorization", None)
    tenant.client.cookies.clear()
    return tenant.client


def test_without_a_token_every_page_redirects_to_the_sign_in_form(
    tenant: Any, browser_client: Any
) -> None:
    for path in ("/", "/models/returns-v2", "/alerts?state=open"):
        r = browser_client.get(path, follow_redirects=False)
        assert r.status_code == 303, path
        assert r.headers["location"].startswith("/signin?next=")
    r = browser_client.get("/alerts?state=open", follow_redirects=True)
    assert r.status_code == 200 and 'name="token"' in r.text
    assert 'value="/alerts?state=open"' in r.text  # back to where the reader was going


def test_sign_in_sets_a_strict_http_only_cookie_and_the_pages_open(
    tenant: Any, browser_client: Any, engine: Engine
) -> None:
    name = create_model(tenant, engine).name
    r = browser_client.post(
        "/signin", data={"token": tenant.tokens["read"], "next": "/"}, follow_redirects=False
    )
    assert r.status_code == 303 and r.headers["location"] == "/"
    cookie = r.headers["set-cookie"].lower()
    assert "belated_token=" in cookie and "httponly" in cookie and "samesite=strict" in cookie
    assert "secure" not in cookie  # plain http on loopback: a Secure cookie would be dropped
    page = browser_client.get("/")
    assert page.status_code == 200 and name in page.text
    assert "default-src 'none'" in page.headers["content-security-policy"]
    assert "<script" not in page.text
    out = browser_client.post("/signout", follow_redirects=False)
    assert out.status_code == 303 and 'belated_token=""' in out.headers["set-cookie"]
    assert browser_client.get("/", follow_redirects=False).status_code == 303


def test_sign_in_over_https_marks_the_cookie_secure(tenant: Any, browser_client: Any) -> None:
    r = browser_client.post(
        "https://testserver/signin",
        follow_redirects=False,
        data={"token": tenant.tokens["read"], "next": "/alerts"},
    )
    assert r.status_code == 303 and r.headers["location"] == "/alerts"
    assert "secure" in r.headers["set-cookie"].lower()


def test_a_wrong_token_shows_the_form_again_with_an_error(
    tenant: Any, browser_client: Any, engine: Engine
) -> None:
    before = rows(engine, "SELECT count(*) FROM tokens")[0][0]
    r = browser_client.post(
        "/signin", data={"token": "blt_not-a-token", "next": "/"}, follow_redirects=False
    )
    assert r.status_code == 401 and "set-cookie" not in r.headers
    assert 'role="alert"' in r.text and 'name="token"' in r.text
    assert rows(engine, "SELECT count(*) FROM tokens")[0][0] == before


def test_a_token_without_the_read_scope_is_refused(tenant: Any, browser_client: Any) -> None:
    for scopes in ("ingest", "admin"):
        r = browser_client.post(
            "/signin", data={"token": tenant.tokens[scopes], "next": "/"}, follow_redirects=False
        )
        assert r.status_code == 403 and "set-cookie" not in r.headers
        assert "read" in r.text and 'role="alert"' in r.text
        page = browser_client.get("/", headers=tenant.headers(scopes), follow_redirects=False)
        assert page.status_code == 403 and "read" in page.text


def test_sign_in_never_sends_the_reader_to_another_site(tenant: Any, browser_client: Any) -> None:
    for target in ("//elsewhere.example/", "https://elsewhere.example/", "/\\elsewhere"):
        r = browser_client.post(
            "/signin", data={"token": tenant.tokens["read"], "next": target}, follow_redirects=False
        )
        assert r.status_code == 303 and r.headers["location"] == "/", target
    r = browser_client.post(
        "/signin",
        data={"token": tenant.tokens["read"]},
        headers={"Origin": "http://elsewhere.example"},
        follow_redirects=False,
    )
    assert r.status_code == 403 and "set-cookie" not in r.headers


def test_another_projects_model_is_not_found(tenant: Any, sessions: Any, engine: Engine) -> None:
    name = create_model(tenant, engine).name
    with transaction(sessions) as session:
        other = keys.get_or_create_project(session=session, name=tenant.name + "-other")
        _, token = keys.create(session=session, project_id=other.id, scopes=["read"])
    r = tenant.client.get(f"/models/{name}", headers={"Authorization": f"Bearer {token}"})
    assert r.status_code == 404 and name in r.text
    assert tenant.client.get(f"/models/{name}", headers=tenant.headers("read")).status_code == 200


def test_bad_parameters_are_named_and_text_is_escaped(tenant: Any, engine: Engine) -> None:
    name = create_model(tenant, engine).name
    send(tenant.client, name, "predictions", [prediction(0, tags={"region": "north"})])
    r = tenant.client.get(f"/models/{name}?granularity=fortnight", headers=tenant.headers("read"))
    assert r.status_code == 422 and "granularity" in r.text
    r = tenant.client.get(
        f"/models/{name}", headers=tenant.headers("read"), params={"tag.region": '<b id="x">'}
    )
    # no prediction carries that value: a 422 page that names it, escaped
    assert r.status_code == 422 and "tag.region" in r.text and "north" in r.text
    assert '<b id="x">' not in r.text and "&lt;b id=&#34;x&#34;&gt;" in r.text
    # a key the model has never seen: named, with the stored ones
    r = tenant.client.get(
        f"/models/{name}", headers=tenant.headers("read"), params={"tag.regoin": "north"}
    )
    assert r.status_code == 422 and "tag.regoin" in r.text and "region" in r.text
    # the old spelling says what replaced it
    r = tenant.client.get(
        f"/models/{name}", headers=tenant.headers("read"), params={"segment": "region:north"}
    )
    assert r.status_code == 422 and "tag.&lt;key&gt;" in r.text
    # the picker's "all" (an empty value) is no filter
    r = tenant.client.get(
        f"/models/{name}", headers=tenant.headers("read"), params={"tag.region": ""}
    )
    assert r.status_code == 200 and 'name="tag.region"' in r.text


def test_model_page_draws_what_the_orders_say(
    tenant: Any, engine: Engine, sessions: Any, frozen: datetime
) -> None:
    orders = shop_orders()
    name = send_shop(tenant, engine, orders)
    html = tenant.client.get(
        f"/models/{name}?start=2026-03-02", headers=tenant.headers("read")
    ).text
    days = by_day(orders)
    by_start = {
        w["start"]: w
        for w in tenant.client.get(
            f"/v1/models/{name}/metrics",
            params={"start": "2026-03-02"},
            headers=tenant.headers("read"),
        ).json()["windows"]
    }
    scorers = {"precision": precision_score, "recall": recall_score, "fbeta": f1_score}
    for measure, scorer in scorers.items():
        expected = {}
        for d, day in days.items():
            known = [o for o in day if o.label_at]
            truth = [o.actual == "1" for o in known]
            guess = [o.score >= 0.5 for o in known]
            denominator = {
                "precision": sum(guess),
                "recall": sum(truth),
                "fbeta": sum(t or g for t, g in zip(truth, guess, strict=True)),
            }
            if denominator[measure]:
                expected[d] = scorer(truth, guess)
        # labelled windows: the labelled value (scikit-learn); an unsettled window with a
        # projection is drawn at its projected value instead (the API's), as a square
        labelled = points(chart(html, f"m-{measure}"), "circle")
        projected = points(chart(html, f"m-{measure}"), "rect")
        for p in projected:
            w = by_start[p.get("data-window")]
            assert not w["settled"] and p.get("data-projected") == "true"
            assert float(p.get("data-value")) == pytest.approx(
                w["projected"][measure]["value"], rel=1e-5
            )
        drawn = {p.get("data-window") for p in labelled}
        starts = sorted(by_start)
        wanted = {d: v for d, v in expected.items() if starts[d] in drawn}
        assert len(labelled) == len(wanted) and len(labelled) + len(projected) >= len(wanted)
        for p, (_, value) in zip(labelled, sorted(wanted.items()), strict=True):
            assert float(p.get("data-value", "nan")) == pytest.approx(value, rel=1e-5)
        assert (
            len(points(chart(html, f"m-{measure}")))
            + len([e for e in chart(html, f"m-{measure}").iter() if e.get("class") == "gap"])
            == WINDOWS
        )
    # settled: ended more than 10 days ago, or 90% of it labelled while every class's
    # arrival curve at its age is as high (coverage alone never settles a window): the page
    # marks what the API says, and the old windows are settled by age
    api = tenant.client.get(
        f"/v1/models/{name}/metrics", params={"start": "2026-03-02"}, headers=tenant.headers("read")
    ).json()["windows"]
    settled = [w["settled"] for w in api][: len(days)]
    for d, flag in zip(sorted(days), settled, strict=True):
        end = FIRST_DAY + timedelta(days=d + 1)
        if end + timedelta(days=LABEL_DELAY_DAYS) < NOW:
            assert flag, d
        elif sum(1 for o in days[d] if o.label_at) / len(days[d]) < MIN_COVERAGE:
            assert not flag, d
    rate = points(chart(html, "m-positive_rate"))
    assert [p.get("data-settled") == "true" for p in rate] == settled
    assert 0 < sum(settled) < DAYS  # both kinds are on the page
    bars = points(chart(html, "coverage"), "rect")
    assert [float(b.get("data-value", "nan")) for b in bars] == pytest.approx(
        [sum(1 for o in days[d] if o.label_at) / len(days[d]) for d in sorted(days)], rel=1e-5
    )
    # implied by the scores: the page draws the API's implied precision; where no settled
    # reference adjusts the scores, it is expected TP / expected predicted positives, the
    # mean score over flagged orders
    est = [e for e in chart(html, "implied").iter() if e.get("data-row") == "implied precision"]
    drawn = [float(p.get("data-value", "nan")) for p in points(est[0])]
    implied = [w["implied"] for w in api[: len(days)]]
    assert drawn == pytest.approx(
        [i["precision"]["value"] for i in implied if i["precision"]["value"] is not None],
        rel=1e-5,  # the page writes six significant digits
    )
    flagged = {d: [o.score for o in day if o.score >= 0.5] for d, day in days.items()}
    for d, block in zip(sorted(days), implied, strict=True):
        if not block["adjusted"] and flagged[d]:
            assert block["precision"]["value"] == pytest.approx(np.mean(flagged[d]), rel=1e-5)
    # the best F1 threshold, by brute force over the hundred edges
    known = [o for o in orders if o.label_at]
    truth = [o.actual == "1" for o in known]
    f1 = [
        f1_score(truth, [o.score >= k / 100 for o in known], zero_division=0.0) for k in range(100)
    ]
    best = chart(html, "sweep").find(".//*[@class='tmark best']")
    assert best is not None and float(best.get("data-threshold", "nan")) == int(np.argmax(f1)) / 100
    delays = tenant.client.get(f"/v1/models/{name}/delays?start=2026-03-02").json()
    assert f"{delays['quantiles']['p50'] / 24:.1f} days" in html


def test_alerts_show_on_every_page_with_their_breaches(
    tenant: Any, engine: Engine, sessions: Any, frozen: datetime
) -> None:
    name = send_shop(tenant, engine, shop_orders())
    raise_alert(tenant, sessions, name)
    api = tenant.client.get("/v1/alerts", params={"model": name}).json()["items"]
    assert len(api) == 1 and api[0]["breaches"]
    alert = api[0]
    assert alert["description"] == "Precision fell under 0.99."
    read = tenant.headers("read")
    index = tenant.client.get("/", headers=read).text
    assert 'data-raised-alerts="1"' in index
    page = tenant.client.get("/alerts", headers=read).text
    assert page.count('class="breach') == len(alert["breaches"])
    assert f'data-alert="{alert["id"]}"' in page and "Precision under 0.99" in page
    assert "Precision fell under 0.99." in page  # the sentence, on the alert
    model_page = tenant.client.get(f"/models/{name}", headers=read).text
    assert f'data-alert="{alert["id"]}" data-state="raised"' in model_page
    assert "Rule: Precision under 0.99" in model_page  # the model page names the rule
    # a noted alert stays in sight, marked as noted, until it clears
    noted = tenant.client.post(
        f"/v1/alerts/{alert['id']}/note",
        headers=tenant.headers("admin"),
        json={"text": "supplier photos changed; watching"},
    )
    assert noted.status_code == 200, noted.text
    index = tenant.client.get("/", headers=read).text
    assert 'data-noted-alerts="1"' in index and "data-raised-alerts" not in index
    model_page = tenant.client.get(f"/models/{name}", headers=read).text
    assert f'data-alert="{alert["id"]}" data-state="noted"' in model_page
    page = tenant.client.get("/alerts?state=noted", headers=read).text
    assert f'data-alert="{alert["id"]}"' in page and "supplier photos changed; watching" in page
    cleared = tenant.client.get("/alerts?state=cleared", headers=read).text
    assert "data-alert=" not in cleared
    bad = tenant.client.get("/alerts?state=open", headers=read)  # the old names are gone
    assert bad.status_code == 422 and "state" in bad.text
    # states are told apart by shape in the dashboard's own inks, not by a signal palette
    for state, shape in (("raised", "25CF"), ("noted", "25D0"), ("cleared", "25CB")):
        rule = re.search(rf"\.chip\.{state}::before {{ content: \"\\{shape}\"; }}", page)
        assert rule, state
    marks = re.findall(r"\.chip\.(?:raised|noted|cleared)[^{]*{([^}]*)}", page)
    assert marks and not any("moss" in m or "ochre" in m or "brick" in m for m in marks)


def test_a_multiclass_model_shows_its_averaged_measures(
    tenant: Any, engine: Engine, frozen: datetime
) -> None:
    # which room an order's item is for; the outcome is learnt when it is delivered
    rooms = ("bedroom", "kitchen", "office")
    model = create_model(tenant, engine, kind="multiclass", classes=list(rooms))
    sent = [
        {
            "id": f"order-{n}",
            "ts": stamp(FIRST_DAY + timedelta(hours=5 * n)),
            "scores": three_class_scores(rooms[n % 3], 0.7, rooms),
        }
        for n in range(40)
    ]
    r = tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": sent})
    assert r.status_code == 200, r.text
    told = [{"id": f"order-{n}", "actual": rooms[(n // 4) % 3]} for n in range(40)]
    assert (
        tenant.client.post(f"/v1/models/{model.name}/labels", json={"labels": told}).status_code
        == 200
    )
    html = tenant.client.get(
        f"/models/{model.name}?start=2026-03-02", headers=tenant.headers("read")
    ).text
    days: dict[int, tuple[list[str], list[str]]] = {}
    for n in range(40):
        truth, guess = days.setdefault(5 * n // 24, ([], []))
        truth.append(rooms[(n // 4) % 3])
        guess.append(rooms[n % 3])
    pts = points(chart(html, "m-accuracy"))
    assert [float(p.get("data-value", "nan")) for p in pts] == pytest.approx(
        [accuracy_score(*days[d]) for d in sorted(days)], rel=1e-5
    )
    assert 'id="m-fbeta_macro"' in html and 'id="sweep"' not in html


def test_breach_baselines_read_as_words() -> None:
    from belated.web.pages import baseline_text

    assert baseline_text({"value": 0.8123, "drop": 0.1, "tolerance": 0.05, "low": None}) == (
        "value 0.812; drop 0.100; tolerance 0.05"
    )
    # measured values keep three decimals whatever their digits; counts are whole
    assert baseline_text({"value": 0.7, "change": -0.05, "predictions": 12000}) == (
        "value 0.700; change -0.050; predictions 12,000"
    )
    assert baseline_text({"counts": {"north": 3, "south": 4}}) == "counts: 2 values"
    frozen = {"value": 0.74, "start": "2026-11-01T00:00:00Z", "windows": 7, "frozen": True}
    assert baseline_text(frozen) == "value 0.740"
    assert baseline_text(None) == "—"
