"""The value type that every measure returns: a number with an optional interval, or a reason."""

from __future__ import annotations

from dataclasses import dataclass

ValueDict = dict[str, float | str | None]


@dataclass(frozen=True, slots=True)
class Value:
    """A measure's value and interval, or no value and the reason it is undefined.

    `value` is None exactly when the measure is undefined (a zero denominator, a class
    absent, too little data); then `reason` says why in a few words. `low` and `high` are
    None when no interval applies. Everything is a plain Python float so `json` can write it.
    """

    value: float | None
    low: float | None = None
    high: float | None = None
    reason: str | None = None

    @classmethod
    def undefined(cls, reason: str) -> Value:
        """An undefined measure, carrying the reason."""
        return cls(None, None, None, reason)

    @property
    def defined(self) -> bool:
        """Whether the measure has a value."""
        return self.value is not None

    def with_interval(self, low: float | None, high: float | None) -> Value:
        """The same value with the interval [low, high]; an undefined value stays as it is."""
        if self.value is None:
            return self
        return Value(self.value, low, high, self.reason)

    def to_dict(self) -> ValueDict:
        """JSON-ready form: value, low, high, plus reason when there is one."""
        out: ValueDict = {"value": self.value, "low": self.low, "high": self.high}
        if self.reason is not None:
            out["reason"] = self.reason
        return out


def ratio(numerator: float, denominator: float, reason: str) -> Value:
    """numerator / denominator, or undefined with `reason` when the denominator is zero."""
    if denominator == 0:
        return Value.undefined(reason)
    return Value(float(numerator) / float(denominator))
