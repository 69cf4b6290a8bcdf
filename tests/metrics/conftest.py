"""Fixtures shared by the metrics tests."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from belated.clock import clock
from tests.support.datasets import NOW


@pytest.fixture()
def frozen() -> Iterator[None]:
    """The process clock frozen at NOW, let go after the test (tests may move it)."""
    clock.set(NOW)
    yield
    clock.set(None)
