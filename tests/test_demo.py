"""`belated demo` as a new user runs it: it prints the address, a read token and the alerts,
and the day-60 supplier change in the north is flagged on the dashboard."""

from __future__ import annotations

import os
import re
import subprocess
import sys
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx
import pytest

from tests.conftest import free_port

BELATED = Path(sys.executable).with_name("belated")


@pytest.mark.slow
def test_demo_flags_the_day_60_change_in_the_north(tmp_path: Path) -> None:
    port = free_port()
    env = {**os.environ, "BELATED_LOG_FORMAT": "text"}
    out = (tmp_path / "demo.out").open("w+")
    proc = subprocess.Popen(
        [str(BELATED), "demo", "--days", "75", "--port", str(port)],
        stdout=out,
        stderr=subprocess.DEVNULL,
        env=env,
        cwd=tmp_path,
    )
    try:
        deadline = time.monotonic() + 900
        text = ""
        while time.monotonic() < deadline:
            out.seek(0)
            text = out.read()
            if "alert:" in text:
                break
            assert proc.poll() is None, text
            time.sleep(1)
        lines = text.splitlines()
        url = next(x.split(" ", 1)[1] for x in lines if x.startswith("url: "))
        token = next(x.split(" ", 1)[1] for x in lines if x.startswith("token: "))
        alerts = [x for x in lines if x.startswith("alert: ")]
        north = [x for x in alerts if "region:north" in x]
        assert north and all("region:north" in x for x in alerts), alerts
        change_day = (datetime.now(UTC) - timedelta(days=75 - 60)).date()
        firsts = [
            datetime.strptime(m, "%Y-%m-%d").date()
            for m in re.findall(r"window of (\d{4}-\d{2}-\d{2})", " ".join(north))
        ]
        # the label-free shift is seen on the day the change starts (or the next window)
        assert min(firsts) <= change_day + timedelta(days=1)
        assert any("shift positive_rate" in x for x in north)
        page = httpx.get(
            f"{url}models/returns-v2",
            params={"tag.region": "north"},
            cookies={"belated_token": token},
            timeout=60,
        )
        assert page.status_code == 200
        assert "raised" in page.text and "region:north" in page.text
        assert "provisional" in page.text  # the cautions and unsettled windows are shown
        read_only = httpx.post(
            f"{url}v1/models", json={"name": "x"}, headers={"Authorization": f"Bearer {token}"}
        )
        assert read_only.status_code == 403  # the printed token only reads
    finally:
        proc.terminate()
        proc.wait(30)
        out.close()
