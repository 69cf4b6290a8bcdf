"""uvicorn serving an ASGI app over real HTTP on loopback, in a background thread.

The server binds port 0, so the kernel picks a free port at bind time (there is no window in
which another process could take a port chosen beforehand); the port is read back from the
server's listening socket once it has started.

A test that needs the address before the server listens (`hold_port=True`) gets a socket
bound to port 0 at once and not yet listening: connections are refused until the server
starts and listens on that very socket.
"""

from __future__ import annotations

import socket
import threading
from typing import Any

from tests.support.polling import wait_until

START_SECONDS = 20.0


class LiveServer:
    """uvicorn serving the app on a loopback port the kernel picks."""

    def __init__(self, asgi: Any, *, hold_port: bool = False) -> None:
        import uvicorn

        config = uvicorn.Config(asgi, host="127.0.0.1", port=0, log_level="warning", lifespan="on")
        self.server = uvicorn.Server(config)
        self.held: socket.socket | None = None
        self.port = 0
        self.url = ""
        if hold_port:
            self.held = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
            self.held.bind(("127.0.0.1", 0))
            self._address(int(self.held.getsockname()[1]))
        sockets = [self.held] if self.held is not None else None
        self.thread = threading.Thread(
            target=self.server.run, kwargs={"sockets": sockets}, daemon=True
        )

    def _address(self, port: int) -> None:
        self.port = port
        self.url = f"http://127.0.0.1:{port}"

    def __enter__(self) -> LiveServer:
        self.thread.start()
        try:
            wait_until(
                lambda: self.server.started or not self.thread.is_alive(),
                START_SECONDS,
                step=0.02,
                what="uvicorn to start",
            )
            if not self.server.started:
                raise RuntimeError("uvicorn stopped before it started serving")
            self._address(bound_port(self.server))
        except BaseException:
            self.__exit__()
            raise
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.should_exit = True
        if self.thread.is_alive():
            self.thread.join(timeout=20)
        if self.held is not None:
            self.held.close()


def bound_port(server: Any) -> int:
    """The port of the server's one listening socket (uvicorn keeps its asyncio servers)."""
    ports = {int(sock.getsockname()[1]) for srv in server.servers for sock in (srv.sockets or ())}
    assert len(ports) == 1, f"expected one listening port, found {sorted(ports)}"
    return ports.pop()
