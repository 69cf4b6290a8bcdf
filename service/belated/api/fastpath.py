"""The short road for the commonest requests of a live system: small batches.

Called by the body-limit middleware (api/limits.py) once it holds the body. A
`POST /v1/models/{model}/predictions` (or `/labels`) whose token and model are in the caches of
api/lookups.py, and whose body is a small batch that passes validation, is validated here
and handed to the group writer (store/grouped.py); the answer goes out once it is
committed, as the route would send it. FastAPI's routing and dependency solving cost a
one-prediction request about as much as its insert does.

Everything else, and every request this road cannot answer with a 200 (an unknown token, a
model not cached, a body that fails validation, a conflict, a busy or failing store), goes
on to the app, which answers it the ordinary way: nothing of such a request was stored here,
so the app sees it exactly as it was sent.
"""

from __future__ import annotations

import asyncio
import re
from typing import Any

import orjson

from belated.api.lookups import Lookups
from belated.clock import clock
from belated.ingest.validate import validate_labels, validate_predictions
from belated.store import grouped
from belated.store.keys import hash_token

PARSED_BODY = "belated.parsed_body"  # the key of a body parsed here, in the request's state
_PATH = re.compile(r"^/v1/models/([^/]+)/(predictions|labels)$")
_HEADERS = [(b"content-type", b"application/json")]


class SmallWrites:
    """Answers small prediction batches from known callers without the framework."""

    def __init__(self, state: Any) -> None:
        self.state = state

    async def __call__(self, scope: dict[str, Any], body: bytes, send: Any) -> bool:
        """Answer the request if this road can; False leaves it to the app, untouched."""
        if scope["method"] != "POST":
            return False
        match = _PATH.match(scope["path"])
        if match is None:
            return False
        answer = await self._answer(scope, match[1], match[2], body)
        if answer is None:
            return False
        await send(
            {
                "type": "http.response.start",
                "status": 200,
                "headers": [*_HEADERS, (b"content-length", str(len(answer)).encode())],
            }
        )
        await send({"type": "http.response.body", "body": answer})
        return True

    async def _answer(
        self, scope: dict[str, Any], model_name: str, kind: str, body: bytes
    ) -> bytes | None:
        token = _token(scope["headers"])
        if token is None:
            return None
        lookups: Lookups = self.state.lookups
        caller = lookups.tokens.peek(hash_token(token))
        if caller is None or "ingest" not in caller.scopes:
            return None
        model = lookups.models.peek((caller.project_id, model_name))
        if model is None or model.source != "http":
            return None
        try:
            doc = orjson.loads(body)
        except orjson.JSONDecodeError:
            return None
        # the app takes the parsed body from here (api/deps.py json_body): a large batch
        # was parsed twice, a seventh of the service's time for 10,000 predictions. In the
        # request's state, which a middleware's copy of the scope still shares
        scope.setdefault("state", {})[PARSED_BODY] = doc
        sent = doc.get(kind) if isinstance(doc, dict) else None
        if not isinstance(sent, list) or len(sent) > grouped.SMALL_BATCH:
            return None
        now = clock.now()
        validate = validate_predictions if kind == "predictions" else validate_labels
        try:
            items = validate(doc, model.spec, now=now, max_batch=self.state.settings.max_batch)
            done = self.state.group_writer.submit(
                grouped.Batch(model.id, items, len(sent), now, kind)
            )
        except Exception:  # a refusal: the app gives it its full answer
            return None
        try:
            answer: dict[str, int] = await asyncio.wrap_future(done)
        except Exception:  # nothing of the batch was stored; the app answers it afresh
            return None
        self.state.counters.add(kind, answer["accepted"] if kind == "predictions" else len(items))
        return orjson.dumps(answer)


def _token(headers: list[tuple[bytes, bytes]]) -> str | None:
    """The bearer token (or the dashboard cookie is left to the app)."""
    for name, value in headers:
        if name == b"authorization":
            scheme, _, rest = value.decode("latin-1").partition(" ")
            return rest.strip() or None if scheme.lower() == "bearer" else None
    return None
