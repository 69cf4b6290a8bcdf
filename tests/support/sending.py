"""Sending predictions and labels over the API, in batches, checking every answer."""

from __future__ import annotations

from typing import Any

BATCH = 2000  # items per request, well under the test settings' max_batch


def send(
    client: Any, model: str, kind: str, items: list[dict[str, Any]], *, batch: int = BATCH
) -> dict[str, int]:
    """POST `kind` ("predictions" or "labels") in batches with the client's own token.

    Every answer must be a 200; the answers' counts are summed over the batches."""
    total: dict[str, int] = {}
    for i in range(0, len(items), batch):
        r = client.post(f"/v1/models/{model}/{kind}", json={kind: items[i : i + batch]})
        assert r.status_code == 200, r.text
        for k, v in r.json().items():
            total[k] = total.get(k, 0) + v
    return total


def send_both(
    client: Any, model: str, preds: list[dict[str, Any]], labels: list[dict[str, Any]]
) -> None:
    """Post the predictions, then the labels."""
    send(client, model, "predictions", preds)
    send(client, model, "labels", labels)
