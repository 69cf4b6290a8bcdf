"""What the lake job needs of a model: its settings as `GET /v1/models/{model}` answers them."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

from belated.classes import negative_class, positive_class
from belated.store.segments import MAX_KEYS


@dataclass(frozen=True)
class LakeModel:
    """A model's rollup settings: kind, classes, threshold, segment keys, implied negatives.

    `max_values` is the server's BELATED_MAX_SEGMENT_VALUES: each tag key keeps that many
    values in rollups (the smallest, sorted; over HTTP the first a refresh sees: see
    `belated.lake.job`), the rest roll up under '(other)'.
    """

    kind: str = "binary"
    classes: tuple[str, ...] = ("0", "1")
    positive: str | None = "1"
    threshold: float = 0.5
    segment_keys: tuple[str, ...] | None = None
    negative_after_days: float | None = None
    max_values: int = 100

    @classmethod
    def of(cls, model: Mapping[str, Any], max_values: int = 100) -> LakeModel:
        """From the JSON of a model (the API's answer)."""
        keys = model.get("segment_keys")
        return cls(
            kind=model.get("kind", "binary"),
            classes=tuple(str(c) for c in model.get("classes") or ("0", "1")),
            positive=model.get("positive"),
            threshold=float(model.get("threshold", 0.5)),
            segment_keys=tuple(keys) if keys is not None else None,
            negative_after_days=model.get("negative_after_days"),
            max_values=max_values,
        )

    @property
    def binary(self) -> bool:
        """Whether the model is binary."""
        return self.kind == "binary"

    @property
    def pos(self) -> str:
        """The positive class (as the store's refresh picks it)."""
        return positive_class(self.positive, self.classes)

    @property
    def neg(self) -> str:
        """The negative class of a binary model."""
        return negative_class(self.positive, self.classes)

    def cutoff(self, now: datetime) -> datetime | None:
        """Predictions at or before this time without a label are implied negatives."""
        if self.negative_after_days is None:
            return None
        return now - timedelta(days=self.negative_after_days)

    def keys_of(self, seen: list[str]) -> list[str]:
        """The tag keys with rollups of their own: the named ones, or the first 8 seen."""
        if self.segment_keys is not None:
            return list(self.segment_keys)
        return sorted(seen)[:MAX_KEYS]
