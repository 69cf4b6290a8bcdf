"""A binary model's positive and negative class, decided in one place.

A binary model has exactly two classes (the API refuses anything else); its positive class
is the one named at creation, or the last of its classes when none was named. Validation,
the rollups, the arrival curves and the lake job all ask here, so they cannot disagree. A
multiclass model has no positive class: for it these answer the last class and another,
which nothing reads.
"""

from __future__ import annotations

from collections.abc import Sequence


def positive_class(positive: str | None, classes: Sequence[str]) -> str:
    """The positive class: the one named, else the last of the classes."""
    return positive or classes[-1]


def negative_class(positive: str | None, classes: Sequence[str]) -> str:
    """The other class of a binary model ("" for a model with one class only)."""
    pos = positive_class(positive, classes)
    return next((c for c in classes if c != pos), "")
