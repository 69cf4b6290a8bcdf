"""`belated markers add|list|delete`: dated notes on a model's timeline, over the API."""

from __future__ import annotations

import typer

from belated.cli.options import FORMAT, MODEL, TOKEN, URL, ask, check_format, connect
from belated.cli.output import show, show_one

markers_app = typer.Typer(
    help="Markers: dated notes on a model's timeline (a supplier change, a release).",
    no_args_is_help=True,
)
COLUMNS = ("id", "at", "text", "who", "created_at")


@markers_app.command("add")
def markers_add(
    text: str = typer.Argument(..., metavar="TEXT", help="What happened."),
    model: str = MODEL,
    at: str = typer.Option(..., "--at", help="When it happened (RFC 3339; no offset: UTC)."),
    url: str = URL,
    token: str = TOKEN,
    fmt: str = FORMAT,
) -> None:
    """Mark something that happened to the model (an admin token)."""
    check_format(fmt)
    with connect(url, token) as client:
        marker = ask(lambda: client.add_marker(model, at, text))
    if fmt == "json":
        show_one(marker, fmt)
    else:
        typer.echo(f"{marker['id']}: {marker['at']} {marker['text']}")


@markers_app.command("list")
def markers_list(
    model: str = MODEL,
    start: str | None = typer.Option(None, "--start", help="From this time (RFC 3339)."),
    end: str | None = typer.Option(None, "--end", help="Before this time (RFC 3339)."),
    url: str = URL,
    token: str = TOKEN,
    fmt: str = FORMAT,
) -> None:
    """List the model's markers, oldest first."""
    check_format(fmt)
    with connect(url, token) as client:
        found = ask(lambda: client.markers(model, start=start, end=end))
    show(found, COLUMNS, fmt, f"{model}: {len(found)} markers")


@markers_app.command("delete")
def markers_delete(
    marker_id: str = typer.Argument(..., metavar="MARKER_ID", help="The marker's id."),
    model: str = MODEL,
    url: str = URL,
    token: str = TOKEN,
) -> None:
    """Remove a marker (an admin token)."""
    with connect(url, token) as client:
        ask(lambda: client.delete_marker(model, marker_id))
    typer.echo(f"removed the marker {marker_id}")
