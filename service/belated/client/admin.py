"""The settings side of the API as client calls: models, rules, tokens."""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any, cast

from belated.client.rows import plain

ERASE_BATCH = 10_000  # ids per request: the service's default BELATED_MAX_BATCH


class AdminCalls:
    """Calls on models, rules and tokens; `Client` supplies `request`."""

    def request(
        self,
        method: str,
        path: str,
        *,
        body: Any = None,
        params: dict[str, Any] | None = None,
        repeatable: bool = True,
    ) -> Any:
        """Send one request and answer the JSON body (defined by `Client`)."""
        raise NotImplementedError

    def _all(self, path: str, params: dict[str, Any] | None = None) -> list[dict[str, Any]]:
        """Every item of a listing, following `next_cursor`."""
        query: dict[str, Any] = dict(params or {})
        out: list[dict[str, Any]] = []
        while True:
            page = self.request("GET", path, params=query)
            out += page["items"]
            if not page.get("next_cursor"):
                return out
            query["cursor"] = page["next_cursor"]

    def models(self) -> list[dict[str, Any]]:
        """Every model of the project, with its settings and stored counts."""
        return self._all("/v1/models", {"limit": 500})

    def update_model(self, name: str, **fields: Any) -> dict[str, Any]:
        """Change a model's settings (PATCH); answers the model."""
        return cast(dict[str, Any], self.request("PATCH", f"/v1/models/{name}", body=plain(fields)))

    def delete_model(self, name: str) -> None:
        """Delete a model with all its data."""
        self.request("DELETE", f"/v1/models/{name}")

    def erase(
        self, model: str, ids: Iterable[str | int], *, batch_size: int = ERASE_BATCH
    ) -> dict[str, Any]:
        """Erase predictions by id, with their labels, label history and pending labels,
        in requests of `batch_size` ids (at most the service's BELATED_MAX_BATCH); answers
        the summed counts removed and the ids of which nothing was stored. A request retried
        after its answer was lost reports its ids as not found (they are gone either way);
        `expired` lists the ids whose raw rows retention had already dropped."""
        wanted = [str(i) for i in ids]
        total: dict[str, Any] = {
            "erased": {"predictions": 0, "labels": 0, "pending_labels": 0},
            "not_found": [],
            "expired": [],
        }
        for start in range(0, len(wanted), batch_size):
            answer = self.request(
                "DELETE",
                f"/v1/models/{model}/predictions",
                body={"ids": wanted[start : start + batch_size]},
            )
            for key in total["erased"]:
                total["erased"][key] += int(answer["erased"][key])
            total["not_found"] += answer["not_found"]
            total["expired"] += answer.get("expired", [])
        return total

    def pending(self, model: str) -> list[dict[str, Any]]:
        """Labels waiting for their prediction, oldest first, with `age_hours` and when the
        jobs drop them (`dropped_after`, past the model's keep_raw_days)."""
        return self._all(f"/v1/models/{model}/pending", {"limit": 1000})

    def rules(self, model: str, *, retired: bool = False) -> list[dict[str, Any]]:
        """The model's rules (with the retired ones when `retired`)."""
        return self._all(f"/v1/models/{model}/rules", {"retired": str(retired).lower()})

    def create_rule(self, model: str, **fields: Any) -> dict[str, Any]:
        """Create an alert rule (`kind`, `measure`, ... as in POST .../rules)."""
        return cast(
            dict[str, Any],
            self.request("POST", f"/v1/models/{model}/rules", body=plain(fields), repeatable=False),
        )

    def delete_rule(self, model: str, rule_id: str) -> None:
        """Retire a rule (its alerts and breaches stay)."""
        self.request("DELETE", f"/v1/models/{model}/rules/{rule_id}")

    def keys(self, *, revoked: bool = False) -> list[dict[str, Any]]:
        """The project's tokens, without secrets (with revoked ones when `revoked`)."""
        return self._all("/v1/keys", {"revoked": str(revoked).lower()})

    def create_key(self, scopes: list[str], name: str | None = None) -> dict[str, Any]:
        """Create a token of this project; the answer's `token` is shown this once."""
        return cast(
            dict[str, Any],
            self.request(
                "POST", "/v1/keys", body={"scopes": scopes, "name": name}, repeatable=False
            ),
        )

    def revoke_key(self, key_id: str) -> None:
        """Revoke a token of this project."""
        self.request("DELETE", f"/v1/keys/{key_id}")
