"""What the data commands share: the service's address, the token, the model, and the way
they fail.

Exit codes: 0 done, 1 refused (a bad row, a refusal by the service, the service unreachable),
2 usage (options, a missing column, an unreadable file).
"""

from __future__ import annotations

import typer

URL = typer.Option(..., "--url", envvar="BELATED_URL", help="The service address.")
TOKEN = typer.Option(
    ...,
    "--token",
    envvar="BELATED_TOKEN",
    help="An API token: ingest scope to send, read to check rows and to show.",
)
MODEL = typer.Option(..., "--model", "-m", help="The model's name.")


def fail(message: str, code: int = 1) -> typer.Exit:
    """Print `message` on stderr; the exit to raise (1 refused, 2 usage)."""
    typer.echo(message, err=True)
    return typer.Exit(code)
