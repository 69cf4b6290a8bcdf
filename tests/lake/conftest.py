"""The lake tests' clock: frozen at the logs' NOW."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from belated.clock import clock
from tests.support.lake import NOW


@pytest.fixture()
def frozen() -> Iterator[None]:
    """The process clock frozen at NOW, let go after the test."""
    clock.set(NOW)
    yield
    clock.set(None)
