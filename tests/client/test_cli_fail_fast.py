"""Nothing listening: every command that talks to the service fails at once with one line
(no retry loop), and the client retries a refused connection only once the service has
answered. Help text shows no type artefacts."""

from __future__ import annotations

import subprocess

import pytest
import typer
from typer.testing import CliRunner

from belated.cli import app
from belated.client import Client, Unreachable
from tests.client import belated
from tests.conftest import LiveServer, Tenant, free_port

COMMANDS = [
    ("models", "list"),
    ("models", "show", "returns-v2"),
    ("models", "create", "returns-v2"),
    ("rules", "list", "--model", "returns-v2"),
    ("alerts", "list"),
    ("alerts", "note", "alr_1", "checked"),
    ("keys", "list"),
    ("keys", "revoke", "key_1"),
    ("markers", "list", "--model", "returns-v2"),
    ("markers", "add", "--model", "returns-v2", "--at", "2026-10-01", "supplier change"),
    ("windows", "--model", "returns-v2"),
]


def test_a_refused_connection_is_one_line_for_every_command() -> None:
    url = f"http://127.0.0.1:{free_port()}"
    for args in COMMANDS:
        run: subprocess.CompletedProcess[str] = belated(*args, url=url, token="blt_x", timeout=60)
        assert run.returncode == 1, (args, run.stdout, run.stderr)
        lines = [line for line in run.stderr.splitlines() if line.strip()]
        assert lines == [f"cannot reach the service: {url}: {REFUSED}"], (args, run.stderr)
        assert run.stdout == ""


REFUSED = "connection refused (is the service running at this address?)"


def test_the_client_does_not_wait_on_a_port_nobody_listens_on() -> None:
    waits: list[float] = []
    url = f"http://127.0.0.1:{free_port()}"
    with Client(url, "blt_x", retries=8, refused_retries=0, sleep=waits.append) as c:
        with pytest.raises(Unreachable) as info:
            c.model("returns-v2")
    assert waits == [] and "connection refused" in info.value.detail
    # the default keeps the patient behaviour of a library client: every retry is waited
    with Client(url, "blt_x", retries=3, sleep=waits.append) as c, pytest.raises(Unreachable):
        c.model("returns-v2")
    assert len(waits) == 3


def test_once_the_service_has_answered_a_refusal_is_retried(
    live: LiveServer, tenant: Tenant
) -> None:
    waits: list[float] = []
    c = Client(live.url, tenant.tokens["read"], retries=2, refused_retries=0, sleep=waits.append)
    with c:
        assert c.models() == []
        live.__exit__()  # the service goes away after answering once
        with pytest.raises(Unreachable):
            c.models()
    assert len(waits) == 2


def _commands(group: typer.Typer, prefix: tuple[str, ...]) -> list[tuple[str, ...]]:
    out = [prefix]
    for cmd in group.registered_commands:
        out.append((*prefix, cmd.name or (cmd.callback.__name__ if cmd.callback else "")))
    for sub in group.registered_groups:
        assert sub.typer_instance is not None and sub.name is not None
        out += _commands(sub.typer_instance, (*prefix, sub.name))
    return out


def test_help_text_has_no_type_artefacts() -> None:
    runner = CliRunner()
    seen = 0
    for path in _commands(app, ()):
        result = runner.invoke(app, [*path, "--help"], env={"COLUMNS": "200"})
        assert result.exit_code == 0, (path, result.output)
        for artefact in ("<bool>", "{", "}"):
            assert artefact not in result.output, (path, artefact, result.output)
        seen += 1
    assert seen >= 25  # every group and command of the CLI
    sent = runner.invoke(app, ["send", "predictions", "--help"], env={"COLUMNS": "200"})
    assert "Usage: root send predictions [OPTIONS] FILE" in " ".join(sent.output.split())
