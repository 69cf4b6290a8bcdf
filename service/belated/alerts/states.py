"""The alert states and events (drawn, with their moves, at the top of `lifecycle.py`)."""

from __future__ import annotations

STATES = ("raised", "noted", "cleared")
ACTIVE = ("raised", "noted")
EVENTS = ("alert.raised", "alert.noted", "alert.cleared")
# why an early alert is cleared when the settled window does not bear it out
WITHDRAWN = "withdrawn: the settled window did not confirm it"
