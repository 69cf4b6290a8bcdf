"""`belated alerts list|note`: the project's alerts over the API."""

from __future__ import annotations

from typing import Any

import typer

from belated.cli.options import FORMAT, TOKEN, URL, ask, check_format, connect
from belated.cli.output import show, show_one
from belated.timeutil import parse_ts
from belated.zones import DEFAULT_ZONE, is_utc, local_iso, wall_text, zone

alerts_app = typer.Typer(help="Alerts: list them, note one.", no_args_is_help=True)
COLUMNS = ("id", "state", "model", "kind", "measure", "segment", "started_at", "description")


@alerts_app.command("list")
def alerts_list(
    state: str | None = typer.Option(None, "--state", help="raised, noted, cleared (a list)."),
    model: str | None = typer.Option(None, "--model", "-m", help="Only this model's alerts."),
    since: str | None = typer.Option(None, "--since", help="Raised at or after (RFC 3339)."),
    url: str = URL,
    token: str = TOKEN,
    fmt: str = FORMAT,
) -> None:
    """List alerts, newest first."""
    check_format(fmt)
    with connect(url, token) as client:
        found = ask(lambda: client.alerts(state=state, model=model, since=since))
    if fmt != "json":
        found = [_local(a, fmt) for a in found]
    show(found, COLUMNS, fmt, f"{len(found)} alerts")


def _local(alert: dict[str, Any], fmt: str) -> dict[str, Any]:
    """A zoned model's alert with its start in the model's zone: wall time with the offset
    in a table, RFC 3339 with the offset in CSV (a UTC model's alert as the API gives it)."""
    name, started = alert.get("time_zone") or DEFAULT_ZONE, alert.get("started_at")
    if is_utc(name) or not started:
        return alert
    at, tz = parse_ts(started), zone(name)
    shown = local_iso(at, tz) if fmt == "csv" else wall_text(at, tz)
    return {**alert, "started_at": shown}


@alerts_app.command("note")
def alerts_note(
    alert_id: str = typer.Argument(..., metavar="ALERT_ID", help="The alert's id."),
    text: str = typer.Argument(..., metavar="TEXT", help="What you have to say about it."),
    url: str = URL,
    token: str = TOKEN,
    fmt: str = FORMAT,
) -> None:
    """Note an alert (an admin token): who and what are kept; a raised alert becomes noted."""
    check_format(fmt)
    with connect(url, token) as client:
        alert = ask(lambda: client.note(alert_id, text))
    if fmt == "json":
        show_one(alert, fmt)
    else:
        typer.echo(f"{alert['id']}: {alert['state']}, {len(alert.get('notes') or [])} notes")
