"""How the dashboard names things: measures, counts with their nouns."""

from __future__ import annotations

from typing import Any

NAMES = {
    "precision": "Precision",
    "recall": "Recall",
    "fbeta": "F1",
    "accuracy": "Accuracy",
    "positive_rate": "Predicted positive rate",
    "precision_macro": "Precision (macro)",
    "recall_macro": "Recall (macro)",
    "fbeta_macro": "F1 (macro)",
}


def name_of(measure: str, beta: float = 1.0) -> str:
    """A reader's name for a measure (F-beta named for its β)."""
    if measure.startswith("fbeta") and beta != 1.0:
        return NAMES[measure].replace("F1", f"F{beta:g}")
    return NAMES.get(measure, measure.replace("_", " "))


def num3(x: float | None) -> str:
    """A value with three decimals, or a dash."""
    return "-" if x is None else f"{x:.3f}"


def plural(n: int, word: str) -> str:
    """`n word` with thousands separators, the word in the plural unless n is 1."""
    return f"{n:,} {word}" if n == 1 else f"{n:,} {word}s"


def labelled_text(w: dict[str, Any]) -> str:
    """How much of a window is labelled, as a reader says it."""
    return f"{w['labelled']:,} of {plural(w['predictions'], 'prediction')} labelled"
