"""The `belated` command.

service.py   migrate, serve, worker, rebuild, demo (on the store, not through the API)
keys.py      keys create
send.py      send predictions|labels FILE (files.py reads the file, sender.py sends it)
windows.py   windows: the latest windows as a table
options.py   the options and the exit the data commands share
"""

from __future__ import annotations

import sys

import typer

from belated.cli import service
from belated.cli.keys import keys_app
from belated.cli.send import send_app
from belated.cli.windows import windows

app = typer.Typer(
    help="belated: monitoring for classifiers whose labels arrive late.",
    no_args_is_help=True,
    add_completion=False,
)
app.add_typer(keys_app, name="keys")
for command in (service.migrate, service.serve, service.worker, service.rebuild, service.demo):
    app.command()(command)


def register(app: typer.Typer) -> None:
    """Add `send` and `windows` to the `belated` app (a second call changes nothing)."""
    if not any(g.name == "send" for g in app.registered_groups):
        app.add_typer(send_app, name="send")
    if not any(
        (c.name or getattr(c.callback, "__name__", "")) == "windows"
        for c in app.registered_commands
    ):
        app.command("windows")(windows)


register(app)


def main() -> None:
    """Entry point for `python -m belated`."""
    app(sys.argv[1:])
