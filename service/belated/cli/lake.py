"""`belated lake run`: compute a lake-fed model's rollup rows on DuckDB or Spark and upload
them (or write them as Parquet with --out).

Exit codes: 0 done, 1 refused (the service refused an upload or is unreachable), 2 usage.
"""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

import typer

from belated.cli.options import MODEL, TOKEN, URL, ask, connect, fail

lake_app = typer.Typer(
    help="Rollups computed where the prediction and label logs live (lake-fed models).",
    no_args_is_help=True,
)


PREDICTIONS = typer.Option(
    ..., "--predictions", help="Parquet file(s) or glob of the predictions log."
)
LABELS = typer.Option(
    ..., "--labels", help="Parquet file(s) or glob of the labels log (every label so far)."
)
ENGINE = typer.Option("duckdb", "--engine", help="duckdb (one machine) or spark.")
SINCE = typer.Option(None, "--since", help="Only the hours from this UTC day on (YYYY-MM-DD).")
TOUCHED = typer.Option(
    None, "--touched-by", help="Parquet file(s) of new labels: only the hours of their predictions."
)
OUT = typer.Option(
    None, "--out", help="Write the rollup rows as Parquet here instead of uploading."
)
NOW = typer.Option(
    None,
    "--now",
    help="The time implied negatives are judged at, RFC 3339 (default: now; for backfills).",
)
EVERY = typer.Option(
    24.0,
    "--every",
    min=0.0,
    help="Hours between incremental runs: --touched-by also recomputes the hours whose"
    " predictions crossed negative_after_days in that time.",
)
MAX_VALUES = typer.Option(
    100, "--max-values", min=1, help="Values per tag key (the service's setting)."
)


@lake_app.command("run")
def run_command(
    model: str = MODEL,
    predictions: list[str] = PREDICTIONS,
    labels: list[str] = LABELS,
    engine: str = ENGINE,
    since: str | None = SINCE,
    touched_by: list[str] | None = TOUCHED,
    out: Path | None = OUT,
    max_values: int = MAX_VALUES,
    now: str | None = NOW,
    every: float = EVERY,
    url: str = URL,
    token: str = TOKEN,
) -> None:
    """Compute the model's rollup rows from the logs and upload whole hours."""
    from belated.lake import ENGINES
    from belated.lake.run import run

    if engine not in ENGINES:
        raise fail(f"--engine must be one of {', '.join(ENGINES)}, not {engine!r}", 2)
    since_hour = None
    if since is not None:
        try:
            day = datetime.strptime(since, "%Y-%m-%d").replace(tzinfo=UTC)
        except ValueError:
            raise fail(f"--since must be a day YYYY-MM-DD, not {since!r}", 2) from None
        since_hour = int(day.timestamp()) // 3600
    when = datetime.now(UTC)
    if now is not None:
        try:
            when = datetime.fromisoformat(now.replace("Z", "+00:00"))
        except ValueError:
            raise fail(f"--now must be an RFC 3339 time, not {now!r}", 2) from None
        if when.tzinfo is None:
            when = when.replace(tzinfo=UTC)
    with connect(url, token) as client:
        done = ask(
            lambda: run(
                client=client,
                model_name=model,
                predictions=predictions,
                labels=labels,
                engine=engine,
                now=when,
                since_hour=since_hour,
                touched_by=touched_by or None,
                out=out,
                max_values=max_values,
                every_hours=every,
            )
        )
    where = f"written to {done['written']}" if "written" in done else "uploaded"
    typer.echo(f"{done['rows']} rollup rows of {done['hours']} hours {where}")
