"""What a rule's decision reads and writes: windows, baselines, projections and verdicts.

Plain data, no I/O and no statistics: `belated.alerts.decide` (settled and label-free
decisions) and `belated.alerts.early` (early looks on projected measures) both build on it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from belated.stats.droptest import significant
from belated.stats.window import WindowStats
from belated.timeutil import iso


@dataclass(frozen=True, kw_only=True)
class Projection:
    """A rule's measure on an unsettled window as projected once its labels are in.

    `value`, `low` and `high` are the projected value and its central `confidence` interval
    (None when the projection has no value); `arrived_share` is the share of the window's
    expected labels that have arrived; `counts` the projected final confusion counts
    (tp, fp, fn, tn), expected values, so not whole numbers.
    """

    value: float | None
    low: float | None
    high: float | None
    arrived_share: float | None
    counts: tuple[float, float, float, float] | None
    confidence: float = 0.95
    reason: str | None = None


@dataclass(kw_only=True)
class WindowInput:
    """One window of one segment as a rule sees it.

    `projection` is set on a closed, unsettled window a rule with `early: true` may look at;
    `early_look` says an early look of this window is already on record (it is not looked
    at again: one early look per window, see `belated.alerts.early`).
    """

    start: datetime
    end: datetime
    closed: bool
    settled: bool
    stats: WindowStats
    tag_counts: dict[str, int] = field(default_factory=dict)
    projection: Projection | None = None
    early_look: bool = False


@dataclass(frozen=True, kw_only=True)
class Baseline:
    """What a window is compared with: the pooled stats of the baseline's windows, their
    period [start, end) and the starts of the windows pooled. `reason` says why it cannot
    be used yet (a fixed range whose windows are not all settled); then no decision is made."""

    stats: WindowStats
    start: datetime
    end: datetime
    parts: tuple[datetime, ...] = ()
    tag_counts: dict[str, int] = field(default_factory=dict)
    fixed: bool = False
    reason: str | None = None


@dataclass(frozen=True, kw_only=True)
class Frozen:
    """A baseline held still: windows starting at or after `since` compare with it."""

    baseline: Baseline
    since: datetime


@dataclass(frozen=True, kw_only=True)
class Decision:
    """The verdict on one window.

    `recovered` says whether the measure is back within tolerance of the baseline (on the
    point value, whatever the test says): what clears an alert. None when no decision was
    made, with `reason` saying why, and on early looks (they never clear an alert). `basis`
    is the baseline compared with, kept so that the alert this window raises can freeze it.
    `early` marks a decision on projected measures of an unsettled window.
    """

    start: datetime
    end: datetime
    condition: bool
    p_value: float | None = None
    value: float | None = None
    low: float | None = None
    high: float | None = None
    baseline: dict[str, Any] | None = None
    recovered: bool | None = None
    reason: str | None = None
    basis: Baseline | None = field(default=None, compare=False, repr=False)
    # the verdict needs a significant p-value (drop, shift): a missing one never counts
    tested: bool = False
    early: bool = False

    def breached(self, alpha: float, adjusted_p: float | None = None) -> bool:
        """Final verdict; `adjusted_p` replaces the raw p-value after BH. A condition-only
        decision (floor, traffic, stall, tag PSI) needs no p-value; a tested one breaches
        only with a p-value under `alpha`."""
        p = adjusted_p if adjusted_p is not None else self.p_value
        if self.tested:
            return self.condition and significant(p, alpha)
        return self.condition and (p is None or p < alpha)


def baseline_info(base: Baseline, frozen: bool, **extra: Any) -> dict[str, Any]:
    """The baseline as a decision records it: its period, how many windows, frozen or not."""
    return {
        **extra,
        "start": iso(base.start),
        "end": iso(base.end),
        "windows": len(base.parts),
        "fixed": base.fixed,
        "frozen": frozen,
    }
