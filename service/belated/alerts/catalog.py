"""What each measure is to a rule: label-based or label-free, its denominator, its direction."""

from __future__ import annotations

from typing import Any

from belated.stats.droptest import DROP_MEASURES
from belated.stats.projection import PROJECTED

# label-based measures whose support is a count of the confusion matrix
DENOMINATORS: dict[str, tuple[str, ...]] = {
    "precision": ("tp", "fp"),
    "recall": ("tp", "fn"),
    "fbeta": ("tp", "fp", "fn"),
    "accuracy": ("tp", "fp", "fn", "tn"),
    "specificity": ("tn", "fp"),
    "npv": ("tn", "fn"),
    "balanced_accuracy": ("tp", "fp", "fn", "tn"),
    "mcc": ("tp", "fp", "fn", "tn"),
    "prevalence": ("tp", "fp", "fn", "tn"),
    "roc_auc": ("tp", "fp", "fn", "tn"),
    "average_precision": ("tp", "fp", "fn", "tn"),
}
IMPLIED_PREFIX = "implied."
LABEL_FREE = ("positive_rate", "implied.precision", "implied.recall", "implied.fbeta")
SHIFT_MEASURES = ("positive_rate", "score_psi")  # and tag_psi:<key>


def is_label_based(measure: str) -> bool:
    """Whether the measure needs labels (so only settled windows are evaluated)."""
    return measure in DENOMINATORS


def support(measure: str, confusion: dict[str, Any]) -> int:
    """The count in the measure's denominator in a window."""
    return int(sum(confusion.get(k, 0) for k in DENOMINATORS.get(measure, ())))


# measures whose window value has no interval: a `confident` floor cannot be decided on them
NO_INTERVAL = ("average_precision", "implied.precision", "implied.recall", "implied.fbeta")


def check(kind: str, measure: str | None, mode: str | None = None) -> str | None:
    """None when the (kind, measure, mode) can work, else the reason it cannot: a rule that
    could never fire is refused at creation."""
    if kind in ("floor", "drop"):
        if measure is None:
            return f"a {kind} rule needs a measure"
        if measure not in DENOMINATORS and measure not in LABEL_FREE:
            return (
                f"unknown measure {measure!r} for a {kind} rule; choose from "
                f"{', '.join([*DENOMINATORS, *LABEL_FREE])}"
            )
        if kind == "drop" and measure not in DROP_MEASURES:
            return f"no significance test for a drop in {measure!r}; a drop rule needs one"
        if kind == "floor" and mode == "confident" and measure in NO_INTERVAL:
            return (
                f"{measure!r} has no interval, so a confident floor could never decide; "
                "use mode point"
            )
        return None
    if kind == "shift":
        if measure is None:
            return "a shift rule needs measure positive_rate, score_psi or tag_psi:<key>"
        if measure in SHIFT_MEASURES or (measure.startswith("tag_psi:") and len(measure) > 8):
            return None
        if measure in DENOMINATORS:
            return f"{measure!r} needs labels; a shift rule watches label-free quantities"
        return f"unknown shift measure {measure!r}; use positive_rate, score_psi or tag_psi:<key>"
    if kind in ("stall", "traffic"):
        return None
    return f"unknown rule kind {kind!r}"


# every measure a rule watches is a proportion in [0, 1] except these
VALUE_RANGES: dict[str, tuple[float, float]] = {"mcc": (-1.0, 1.0)}


def check_threshold(kind: str, measure: str | None, threshold: float | None) -> str | None:
    """None when the threshold lies in the range of what it is compared with, else why not:
    a floor under a proportion's 0-1 scale written as a percentage could never mean what
    was meant."""
    if threshold is None or measure is None:
        return None
    if kind == "floor":
        low, high = VALUE_RANGES.get(measure, (0.0, 1.0))
        if not low <= threshold <= high:
            scale = "a proportion" if (low, high) == (0.0, 1.0) else "a measure"
            hint = (
                f" (for {threshold:g}% write {threshold / 100:g})" if 1 < threshold <= 100 else ""
            )
            return (
                f"{measure} is {scale} between {low:g} and {high:g}; a floor threshold of "
                f"{threshold:g} is outside it{hint}"
            )
    if kind == "shift" and measure == "positive_rate" and not 0 < threshold <= 1:
        return f"a change of positive rate lies in (0, 1]; {threshold:g} is outside it"
    if kind == "shift" and measure != "positive_rate" and threshold < 0:
        return f"a PSI threshold is at least 0; {threshold:g} is below it"
    return None


# label-based measures an unsettled window has a projected value of (stats/projection.py)
PROJECTED_MEASURES: tuple[str, ...] = tuple(PROJECTED)


def check_early(kind: str, measure: str | None) -> str | None:
    """None when a rule of this kind and measure can look early (on projected measures of
    unsettled windows), else the reason `early: true` could never mean anything for it."""
    if kind not in ("floor", "drop"):
        return (
            f"a {kind} rule decides on what a window holds when it closes, with no labels "
            "to wait for; early applies to floor and drop rules on label-based measures"
        )
    if measure is None or not is_label_based(measure):
        return (
            f"{measure!r} needs no labels, so it is final once a window closes; early "
            "applies to label-based measures"
        )
    if measure not in PROJECTED_MEASURES:
        return (
            f"{measure!r} has no projected value on unsettled windows, so an early look "
            f"could never decide; early works on {', '.join(PROJECTED_MEASURES)}"
        )
    return None
