"""The dashboard in a real browser: Debian's chromium, headless, driven through chromedriver
(selenium) against uvicorn on loopback.

The reader signs in through the form, then each page is loaded at a laptop width (1280) and
a phone width (390): titles, charts with the expected number of points, no console error, no
sideways overflow on the phone, and a full-page screenshot under the test's tmp_path.
"""

from __future__ import annotations

import base64
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from selenium import webdriver
from selenium.webdriver.chrome.service import Service
from selenium.webdriver.common.by import By
from selenium.webdriver.support import expected_conditions as ec
from selenium.webdriver.support.ui import WebDriverWait
from sqlalchemy import Engine

from tests.conftest import LiveServer, make_tenant
from tests.support.shop import DAYS, NOW, WINDOWS, by_day, raise_alert, send_shop, shop_orders

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
CHROMEDRIVER = shutil.which("chromedriver")
WIDTHS = {"laptop": 1280, "phone": 390}

# Skipped only where there is no browser at all; with chromium present, a missing driver fails.
pytestmark = pytest.mark.skipif(
    CHROMIUM is None, reason="chromium is not installed (apt-get install chromium chromium-driver)"
)


@pytest.fixture()
def browser(tmp_path: Path) -> Iterator[webdriver.Chrome]:
    """Headless chromium with its own profile, nothing fetched from outside loopback."""
    assert CHROMEDRIVER, "chromium is here but chromedriver is not: apt-get install chromium-driver"
    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for flag in (
        "--headless=new",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--disable-dev-shm-usage",
        f"--user-data-dir={tmp_path / 'profile'}",
        "--window-size=1280,900",
    ):
        options.add_argument(flag)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(options=options, service=Service(executable_path=CHROMEDRIVER))
    driver.set_page_load_timeout(60)
    try:
        yield driver
    finally:
        driver.quit()


def console_errors(driver: webdriver.Chrome) -> list[dict[str, Any]]:
    """Console entries of level SEVERE since the last call (the log is drained on read)."""
    return [e for e in driver.get_log("browser") if e.get("level") == "SEVERE"]


def shoot(driver: webdriver.Chrome, folder: Path, name: str, width: int) -> Path:
    """A full-page screenshot at `width` CSS pixels (a phone width emulates a phone)."""
    driver.execute_cdp_cmd(
        "Emulation.setDeviceMetricsOverride",
        {"width": width, "height": 900, "deviceScaleFactor": 1, "mobile": width < 600},
    )
    driver.refresh()
    height = int(driver.execute_script("return document.documentElement.scrollHeight"))
    overflow = int(driver.execute_script("return document.documentElement.scrollWidth"))
    assert overflow <= width, f"{name} is {overflow}px wide on a {width}px screen"
    shot = driver.execute_cdp_cmd(
        "Page.captureScreenshot",
        {
            "format": "png",
            "captureBeyondViewport": True,
            "clip": {"x": 0, "y": 0, "width": width, "height": height, "scale": 1},
        },
    )
    path = folder / f"{name}-{width}.png"
    path.write_bytes(base64.b64decode(shot["data"]))
    assert path.stat().st_size > 10_000  # a page, not a blank
    return path


def count(driver: webdriver.Chrome, selector: str) -> int:
    """How many elements match a CSS selector."""
    return len(driver.find_elements(By.CSS_SELECTOR, selector))


def test_every_page_renders_in_a_real_browser(
    live: LiveServer, sessions: Any, engine: Engine, browser: webdriver.Chrome, tmp_path: Path
) -> None:
    from belated.clock import clock

    clock.set(NOW)  # the server runs in this process and reads the same clock
    try:
        with httpx.Client(base_url=live.url, timeout=60) as http:
            tenant = make_tenant(sessions, http)
            orders = shop_orders()
            name = send_shop(tenant, engine, orders)
            raise_alert(tenant, sessions, name)
        check_pages(browser, live.url, tenant.tokens["read"], name, orders, tmp_path)
    finally:
        clock.set(None)


def check_pages(
    driver: webdriver.Chrome, url: str, token: str, name: str, orders: list[Any], tmp_path: Path
) -> None:
    """Sign in through the form, then load and check each page."""
    shots = tmp_path / "screens"
    shots.mkdir()
    driver.get(url + "/")
    assert driver.current_url.startswith(url + "/signin")
    assert driver.title == "Sign in · belated"
    shoot(driver, shots, "signin", WIDTHS["phone"])
    driver.find_element(By.ID, "token").send_keys("blt_wrong")
    driver.find_element(By.CSS_SELECTOR, "form[action='/signin'] button").click()
    error = WebDriverWait(driver, 20).until(
        ec.presence_of_element_located((By.CSS_SELECTOR, ".error"))
    )
    assert "not one this service knows" in error.text
    # the browser logs the refused sign-in's 401 as a failed load, and nothing else
    assert all(
        e["source"] == "network" and "/signin" in e["message"] and "401" in e["message"]
        for e in console_errors(driver)
    )
    driver.find_element(By.ID, "token").send_keys(token)
    driver.find_element(By.CSS_SELECTOR, "form[action='/signin'] button").click()
    WebDriverWait(driver, 20).until(ec.url_to_be(url + "/"))
    assert driver.title == "Models · belated"
    assert driver.find_element(By.CSS_SELECTOR, f"[data-model='{name}'] h2").text == name
    assert (
        driver.find_element(By.CSS_SELECTOR, f"[data-model='{name}'] [data-raised-alerts]").text
        == "1 raised"
    )
    assert console_errors(driver) == []
    for width in WIDTHS.values():
        shoot(driver, shots, "models", width)

    days = by_day(orders)
    driver.get(f"{url}/models/{name}?start=2026-03-02")
    assert driver.title == f"{name} · belated"
    # 4 measures, coverage, estimates, sweep, delays, and the two drift panels
    assert count(driver, "svg[role='img']") == 10
    assert count(driver, "svg[id^='drift-']") == 2
    # every day has orders and so a positive rate; the current day has none (a gap)
    assert count(driver, "svg#m-positive_rate circle.pt") == DAYS
    assert count(driver, "svg#m-positive_rate .gap") == WINDOWS - DAYS
    assert count(driver, "svg#coverage rect.pt") == len(days)
    assert count(driver, "svg#sweep [data-series='recall'] circle.pt") == 100
    assert count(driver, "svg#m-precision .pt.prov") > 0  # hollow, or a projected square
    assert "Read these numbers with care" in driver.find_element(By.CSS_SELECTOR, ".care").text
    assert count(driver, "[data-alert]") == 1
    assert console_errors(driver) == []
    for width in WIDTHS.values():
        shoot(driver, shots, "model", width)

    driver.get(f"{url}/alerts")
    assert driver.title == "Alerts · belated"
    assert count(driver, "article.alert") == 1 and count(driver, "tr.breach") > 0
    assert console_errors(driver) == []
    for width in WIDTHS.values():
        shoot(driver, shots, "alerts", width)
    assert console_errors(driver) == []
    print(f"screenshots in {shots}")


def test_the_model_page_shows_change_in_a_real_browser(
    live: LiveServer, sessions: Any, engine: Engine, browser: webdriver.Chrome, tmp_path: Path
) -> None:
    """Data: tests/support/regions.py (a north-only precision drop from day 21)."""
    import csv
    import io
    import time
    from datetime import timedelta

    from belated.clock import clock
    from tests.support import regions

    clock.set(regions.NOW)
    try:
        with httpx.Client(base_url=live.url, timeout=60) as http:
            tenant = make_tenant(sessions, http)
            name = regions.send(tenant, engine, regions.orders())
            regions.raise_north(tenant, sessions, name)
            change = regions.FIRST_DAY + timedelta(days=regions.CHANGE_DAY, hours=9)
            r = tenant.client.post(
                f"/v1/models/{name}/markers",
                headers=tenant.headers("admin"),
                json={"at": change.isoformat(), "text": "new sofa supplier in the north"},
            )
            assert r.status_code == 201, r.text
        driver, url = browser, live.url
        driver.get(f"{url}/signin")
        driver.find_element(By.ID, "token").send_keys(tenant.tokens["read"])
        driver.find_element(By.CSS_SELECTOR, "form[action='/signin'] button").click()
        WebDriverWait(driver, 20).until(ec.url_to_be(url + "/"))
        # the default range: from the rule's baseline (day 7) to now, with no date typed
        driver.get(f"{url}/models/{name}")
        shown = driver.find_element(By.ID, "shown")
        assert (
            shown.get_attribute("data-start") == (regions.FIRST_DAY + timedelta(days=7)).isoformat()
        )
        # one alert mark per chart over windows; focusing it names the alert
        for cid in ("m-precision", "m-recall", "m-fbeta", "m-positive_rate", "coverage"):
            assert count(driver, f"svg#{cid} g.mark.alert") == 1, cid
        mark = driver.find_element(By.CSS_SELECTOR, "svg#m-precision g.mark.alert")
        driver.execute_script("arguments[0].focus()", mark)
        focused = driver.execute_script("return document.activeElement")
        assert focused == mark
        said = driver.execute_script("return arguments[0].querySelector('title').textContent", mark)
        assert "region:north" in said and "alert raised" in said
        # the marker: on every chart over windows, named when focused
        for cid in ("m-precision", "m-recall", "m-fbeta", "m-positive_rate", "coverage"):
            assert count(driver, f"svg#{cid} g.mark.marker") == 1, cid
        flag = driver.find_element(By.CSS_SELECTOR, "svg#m-recall g.mark.marker")
        driver.execute_script("arguments[0].focus()", flag)
        assert driver.execute_script("return document.activeElement") == flag
        said = driver.execute_script("return arguments[0].querySelector('title').textContent", flag)
        assert "new sofa supplier in the north" in said
        # the segment table: north marked; sorting by precision, then flipped
        table = driver.find_element(By.ID, "segment-table")
        assert table.get_attribute("data-key") == "region"
        assert [
            r.get_attribute("data-value")
            for r in driver.find_elements(By.CSS_SELECTOR, "#segment-table tr[data-breached]")
        ] == ["north"]

        def column(key: str) -> list[float]:
            cells = driver.find_elements(By.CSS_SELECTOR, f"#segment-table td[data-col='{key}']")
            return [float(c.text) for c in cells]

        driver.find_element(By.CSS_SELECTOR, "#segment-table a[data-sort='precision']").click()
        WebDriverWait(driver, 20).until(ec.url_contains("sort=precision"))
        desc = column("precision")
        assert "order=desc" in driver.current_url and desc == sorted(desc, reverse=True)
        driver.find_element(By.CSS_SELECTOR, "#segment-table a[data-sort='precision']").click()
        WebDriverWait(driver, 20).until(ec.url_contains("order=asc"))
        assert column("precision") == sorted(desc)
        # the β control: F2, kept in the address
        beta = driver.find_element(By.ID, "beta")
        beta.clear()
        beta.send_keys("2")
        driver.find_element(By.CSS_SELECTOR, "form.range.sheet button[type='submit']").click()
        WebDriverWait(driver, 20).until(ec.url_contains("beta=2"))
        title = driver.find_element(By.CSS_SELECTOR, "figure[data-measure='fbeta'] h3").text
        assert title == "F2"
        assert driver.find_element(By.ID, "beta").get_attribute("value") == "2"
        # CSV download of the segment table, by the browser itself
        folder = tmp_path / "downloads"
        folder.mkdir()
        driver.execute_cdp_cmd(
            "Browser.setDownloadBehavior", {"behavior": "allow", "downloadPath": str(folder)}
        )
        link = driver.find_element(
            By.CSS_SELECTOR, "section[aria-labelledby='segments-title'] a.csv"
        )
        assert "beta=2" in (link.get_attribute("href") or "")
        link.click()
        target = folder / f"{name}-segments.csv"
        deadline = time.monotonic() + 60
        while not target.exists() and time.monotonic() < deadline:
            time.sleep(0.2)
        rows = list(csv.DictReader(io.StringIO(target.read_text())))
        assert sorted(r["value"] for r in rows) == sorted(regions.REGIONS)
        assert [r["value"] for r in rows if r["breached"]] == ["north"]
        # the drift chart: score PSI and the positive rate's change, points with values
        for key in ("score_psi", "positive_rate_change"):
            assert count(driver, f"svg#drift-{key} .pts .pt") >= 20, key
        # the tag picker: filled from the stored values, the choice kept in the address
        from selenium.webdriver.support.ui import Select

        picker = Select(driver.find_element(By.CSS_SELECTOR, "select[name='tag.region']"))
        assert [o.get_attribute("value") for o in picker.options] == [
            "",
            *sorted(regions.REGIONS),
        ]
        picker.select_by_value("north")
        driver.find_element(By.CSS_SELECTOR, "form.range.sheet button[type='submit']").click()
        WebDriverWait(driver, 20).until(ec.url_contains("tag.region=north"))
        assert "only region north" in driver.find_element(By.ID, "shown").text
        chosen = Select(driver.find_element(By.CSS_SELECTOR, "select[name='tag.region']"))
        assert chosen.first_selected_option.get_attribute("value") == "north"
        assert console_errors(driver) == []
    finally:
        clock.set(None)
