"""Sending one file batch by batch: rows checked here first (when the token can read the
model), bad rows reported by their place in the file, the service's answers tallied."""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import typer

from belated.cli.options import fail
from belated.client import ANSWER_KEYS, BelatedError, Client

SHOWN = 50  # bad rows printed one by one; later ones are only counted


@dataclass
class Sender:
    """Sends one file batch by batch, checking rows first and tallying the answers."""

    client: Client
    model: str
    kind: str
    spec: Any  # belated.ingest.validate.ModelSpec, or None when the token cannot read it
    skip_bad: bool
    where: str  # "line" for CSV, "row" for Parquet
    totals: dict[str, int] = field(default_factory=dict)
    skipped: int = 0
    noted: int = 0

    def _note(self, line: int, reason: str) -> None:
        self.noted += 1
        if self.noted <= SHOWN:
            typer.echo(f"{self.where} {line}: {reason}", err=True)

    def _local(self, items: list[dict[str, Any]], lines: list[int]) -> dict[int, str]:
        """Rows the service's own rules refuse, by index (the checks the service runs)."""
        if self.spec is None:
            return {}
        from belated.errors import Invalid
        from belated.ingest.validate import validate_labels, validate_predictions

        check = validate_predictions if self.kind == "predictions" else validate_labels
        alive, found = list(range(len(items))), {}
        while alive:
            try:
                check(
                    {self.kind: [items[i] for i in alive]},
                    self.spec,
                    now=datetime.now(UTC),
                    max_batch=len(alive),
                )
                break
            except Invalid as exc:
                bad = self._errors(exc.errors, [lines[i] for i in alive])
                found.update({alive[k]: why for k, why in bad.items()})
            if not self.skip_bad or not bad:
                break  # one round names the first bad rows; only --skip-bad needs them all
            alive = [i for k, i in enumerate(alive) if k not in bad]
        return found

    def _errors(self, errors: list[dict[str, Any]] | None, lines: list[int]) -> dict[int, str]:
        out: dict[int, str] = {}
        for err in errors or []:
            k = err.get("index")
            if not isinstance(k, int) or not 0 <= k < len(lines):
                continue
            reason = re.sub(
                r"at index (\d+)",
                lambda m: f"on {self.where} {lines[int(m[1])]}" if int(m[1]) < len(lines) else m[0],
                str(err.get("reason")),
            )
            where = f"field '{err.get('field')}': " if err.get("field") else ""
            out[k] = (out[k] + "; " if k in out else "") + where + reason
        return out

    def _refused(
        self, exc: BelatedError, items: list[dict[str, Any]], lines: list[int]
    ) -> dict[int, str]:
        """The rows a refusal names: a 422's item indexes, a 409's conflicting ids."""
        if exc.status == 422:
            return self._errors(exc.errors, lines)
        if exc.status == 409 and exc.problem.get("ids"):
            ids = {str(i) for i in exc.problem["ids"]}
            return {
                k: "already stored with different content (predictions are immutable)"
                for k, item in enumerate(items)
                if str(item.get("id")) in ids
            }
        return {}

    def send(self, items: list[dict[str, Any]], lines: list[int]) -> None:
        """Send one batch; stop (exit 1) on a bad row unless bad rows are skipped."""
        first, last = (lines[0], lines[-1]) if lines else (0, 0)
        bad = self._local(items, lines)
        while True:
            for k in sorted(bad):
                self._note(lines[k], bad[k])
            if bad and not self.skip_bad:
                raise fail(
                    f"stopped: nothing of {self.where}s {first}-{last} was stored; "
                    f"before them: {self.summary()}. Fix the rows, or pass --skip-bad "
                    "to skip bad rows."
                )
            self.skipped += len(bad)
            items = [it for k, it in enumerate(items) if k not in bad]
            lines = [n for k, n in enumerate(lines) if k not in bad]
            if not items:
                return
            try:
                answer = self.client.send_batch(self.model, self.kind, items)
            except BelatedError as exc:
                bad = self._refused(exc, items, lines)
                if not bad:
                    raise fail(
                        f"refused ({self.where}s {first}-{last}, nothing of them "
                        f"stored): {exc}\nbefore them: {self.summary()}"
                    ) from None
                continue
            for key in ANSWER_KEYS[self.kind]:
                self.totals[key] = self.totals.get(key, 0) + int(answer.get(key, 0))
            return

    def summary(self) -> str:
        """What was stored so far, in the service's words."""
        parts = [f"{self.totals.get(k, 0)} {k}" for k in ANSWER_KEYS[self.kind]]
        return ", ".join(parts + [f"{self.skipped} skipped"])
