"""`belated erase --model M FILE`: erase predictions by id (ids one per line) over the API."""

from __future__ import annotations

from pathlib import Path

import typer

from belated.cli.options import FORMAT, MODEL, TOKEN, URL, ask, check_format, connect
from belated.cli.output import show_one

FILE = typer.Argument(..., metavar="FILE", help="Ids to erase, one per line.")


def read_ids(path: Path) -> list[str]:
    """Ids one per line; blank lines and surrounding spaces are left out."""
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise typer.BadParameter(f"cannot read {path}: {exc}", param_hint="FILE") from None
    return list(dict.fromkeys(line.strip() for line in text.splitlines() if line.strip()))


def erase(
    file: Path = FILE,
    model: str = MODEL,
    url: str = URL,
    token: str = TOKEN,
    fmt: str = FORMAT,
) -> None:
    """Erase predictions by id, their labels and history (admin); windows recount without them."""
    check_format(fmt)
    ids = read_ids(file)
    if not ids:
        raise typer.BadParameter(f"{file} holds no ids", param_hint="FILE")
    with connect(url, token) as client:
        answer = ask(lambda: client.erase(model, ids))
    if fmt == "json":
        show_one(answer, fmt)
        return
    gone = answer["erased"]
    typer.echo(
        f"{model}: erased {gone['predictions']} predictions, {gone['labels']} labels in"
        f" history, {gone['pending_labels']} pending labels;"
        f" {len(answer['not_found'])} of {len(ids)} ids not found"
    )
    for pid in answer["not_found"]:
        typer.echo(f"not found: {pid}")
    for pid in answer.get("expired", []):
        typer.echo(f"past retention (raw rows already dropped): {pid}")
