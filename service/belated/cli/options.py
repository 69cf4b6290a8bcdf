"""What the data commands share: the service's address, the token, the model, and the way
they fail.

Exit codes: 0 done, 1 refused (a bad row, a refusal by the service, the service unreachable),
2 usage (options, a missing column, an unreadable file).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, TypeVar

import typer

if TYPE_CHECKING:
    from belated.client import Client

T = TypeVar("T")

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


FORMAT = typer.Option("table", "--format", help="table, csv or json.")
FORMATS = ("table", "csv", "json")


def connect(url: str, token: str, retries: int = 3) -> Client:
    """A client that fails at once when nothing listens at `url` (no retry loop), and
    retries a few times once the service has answered."""
    from belated.client import Client

    return Client(url, token, retries=retries, refused_retries=0)


def check_format(fmt: str) -> None:
    """Refuse an unknown --format before anything is asked of the service."""
    if fmt not in FORMATS:
        raise fail(f"--format must be one of {', '.join(FORMATS)}, not {fmt!r}", 2)


def ask(call: Callable[[], T]) -> T:
    """Run one call to the service; a refusal or no answer is one line on stderr, exit 1."""
    from belated.client import BelatedError, Unreachable

    try:
        return call()
    except Unreachable as exc:
        raise fail(f"cannot reach the service: {exc.detail}") from None
    except BelatedError as exc:
        raise fail(f"refused: {exc}") from None
