"""Tests of the Python client and the data commands, and the small helpers they share.

The data is the furniture shop: each order gets a score (will it be returned?), a channel
(web, app, phone) and a region tag; outcomes are drawn from the scores with a seeded numpy
generator, so the scores are calibrated by construction.
"""

from __future__ import annotations

import os
import subprocess
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import typer
from click.testing import Result
from typer.testing import CliRunner

from belated.cli import register

# The `belated` app with the data commands registered (register() is idempotent, so this
# works before and after the cli package registers them itself).
LAUNCH = "from belated.cli import app, register; register(app); app(prog_name='belated')"
CHANNELS = ("web", "app", "phone")
REGIONS = ("north", "south", "east", "west")


def belated(
    *args: str, url: str | None = None, token: str | None = None, timeout: float = 900
) -> subprocess.CompletedProcess[str]:
    """Run the `belated` command in a child process, address and token from the environment."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("BELATED_")}
    if url is not None:
        env["BELATED_URL"] = url
    if token is not None:
        env["BELATED_TOKEN"] = token
    env["COLUMNS"] = "240"
    return subprocess.run(
        [sys.executable, "-c", LAUNCH, *args],
        env=env,
        capture_output=True,
        text=True,
        timeout=timeout,
        check=False,
    )


def invoke(*args: str, url: str | None = None, token: str | None = None) -> Result:
    """Run the data commands in this process (quicker than a child for the short cases)."""
    app = typer.Typer()
    register(app)
    env = {"BELATED_URL": url, "BELATED_TOKEN": token, "COLUMNS": "240"}
    return CliRunner().invoke(app, list(args), env=env)


def shop_orders(n: int, *, seed: int, days: float = 5.0, prefix: str = "ord") -> pd.DataFrame:
    """`n` orders over the last `days` days: id, ts (aware UTC), score, channel, region, actual."""
    rng = np.random.default_rng(seed)
    end = datetime.now(UTC).replace(microsecond=0) - timedelta(minutes=5)
    ts = pd.Timestamp(end) - pd.to_timedelta(rng.uniform(0, days * 86_400, n).round(), unit="s")
    # Returned orders are a minority: scores from Beta(2, 5), mean 2/7.
    score = rng.beta(2.0, 5.0, n).round(6)
    return pd.DataFrame(
        {
            "id": [f"{prefix}-{i:07d}" for i in range(n)],
            "ts": ts,
            "score": score,
            "channel": rng.choice(CHANNELS, n),
            "region": rng.choice(REGIONS, n),
            "actual": (rng.random(n) < score).astype(np.int64),
        }
    )


def prediction_csv(frame: pd.DataFrame, path: Path) -> Path:
    """Write the orders in the file layout of `belated send predictions` (CSV)."""
    out = pd.DataFrame(
        {
            "id": frame["id"],
            "ts": frame["ts"].dt.strftime("%Y-%m-%dT%H:%M:%SZ"),
            "score": frame["score"],
            "tag.channel": frame["channel"],
            "tag.region": frame["region"],
        }
    )
    out.to_csv(path, index=False)
    return path
