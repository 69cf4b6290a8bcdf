"""`belated models list|show|create|update|delete`: the project's models over the API."""

from __future__ import annotations

from typing import Any

import typer

from belated.cli.fields import SET, parse_sets
from belated.cli.options import FORMAT, TOKEN, URL, ask, check_format, connect
from belated.cli.output import show, show_one

models_app = typer.Typer(help="Models: list, show, create, change, delete.", no_args_is_help=True)
NAME = typer.Argument(..., metavar="NAME", help="The model's name.")
COLUMNS = (
    "name",
    "kind",
    "threshold",
    "label_delay_days",
    "min_coverage",
    "segment_keys",
    "predictions",
    "labelled",
    "last_prediction_at",
)


def _row(model: dict[str, Any]) -> dict[str, Any]:
    counts = model.get("counts") or {}
    return {**model, "predictions": counts.get("predictions"), "labelled": counts.get("labelled")}


@models_app.command("list")
def models_list(url: str = URL, token: str = TOKEN, fmt: str = FORMAT) -> None:
    """List the project's models with their settings and stored counts."""
    check_format(fmt)
    with connect(url, token) as client:
        found = ask(client.models)
    show([_row(m) for m in found], COLUMNS, fmt, f"{len(found)} models")


@models_app.command("show")
def models_show(name: str = NAME, url: str = URL, token: str = TOKEN, fmt: str = FORMAT) -> None:
    """One model: its settings and stored counts."""
    check_format(fmt)
    with connect(url, token) as client:
        show_one(ask(lambda: client.model(name)), fmt)


@models_app.command("create")
def models_create(
    name: str = NAME,
    kind: str = typer.Option("binary", "--kind", help="binary or multiclass."),
    sets: list[str] | None = SET,
    url: str = URL,
    token: str = TOKEN,
    fmt: str = FORMAT,
) -> None:
    """Create a model (an admin token); other settings with --set."""
    check_format(fmt)
    fields = {"name": name, "kind": kind, **parse_sets(sets)}
    with connect(url, token) as client:
        show_one(ask(lambda: client.create_model(**fields)), fmt)


@models_app.command("update")
def models_update(
    name: str = NAME,
    sets: list[str] | None = SET,
    url: str = URL,
    token: str = TOKEN,
    fmt: str = FORMAT,
) -> None:
    """Change a model's settings (an admin token): --set threshold=0.35 ..."""
    check_format(fmt)
    fields = parse_sets(sets)
    if not fields:
        raise typer.BadParameter("give at least one --set KEY=VALUE", param_hint="--set")
    with connect(url, token) as client:
        show_one(ask(lambda: client.update_model(name, **fields)), fmt)


@models_app.command("delete")
def models_delete(
    name: str = NAME,
    yes: bool = typer.Option(False, "--yes", help="Do not ask for confirmation."),
    url: str = URL,
    token: str = TOKEN,
) -> None:
    """Delete a model with all its data (an admin token)."""
    if not yes:
        typer.confirm(f"delete the model {name!r} and all its data?", abort=True)
    with connect(url, token) as client:
        ask(lambda: client.delete_model(name))
    typer.echo(f"deleted the model {name!r}")
