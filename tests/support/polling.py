"""A bounded poll on state: the one way tests wait for something another thread, process or
job does. No test sleeps a fixed time and then asserts; it polls until the state holds or a
stated bound runs out, and then fails naming what it waited for."""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import TypeVar

T = TypeVar("T")


def _describe(what: str | Callable[[], object]) -> str:
    return what if isinstance(what, str) else str(what())


def time_until(
    condition: Callable[[], T],
    seconds: float,
    *,
    step: float = 0.1,
    what: str | Callable[[], object] = "the condition",
) -> tuple[T, float]:
    """Poll `condition` every `step` seconds until it returns something true; that value and
    the seconds it took. An AssertionError naming `what` (a text, or a callable giving one,
    read at the failure) when it is still false after `seconds`, checked once more at the end."""
    started = time.monotonic()
    deadline = started + seconds
    while True:
        value = condition()
        if value:
            return value, time.monotonic() - started
        if time.monotonic() >= deadline:
            raise AssertionError(f"{_describe(what)}: not within {seconds:g} s")
        time.sleep(step)


def wait_until(
    condition: Callable[[], T],
    seconds: float,
    *,
    step: float = 0.1,
    what: str | Callable[[], object] = "the condition",
) -> T:
    """Poll `condition` until it returns something true and return that value; fail naming
    `what` after `seconds` (see `time_until`)."""
    return time_until(condition, seconds, step=step, what=what)[0]
