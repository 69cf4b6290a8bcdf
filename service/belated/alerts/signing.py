"""Standard Webhooks signing: HMAC-SHA256 over "{id}.{timestamp}.{body}"."""

from __future__ import annotations

import base64
import hashlib
import hmac
import secrets

PREFIX = "whsec_"


def new_secret() -> str:
    """A fresh secret: whsec_ and base64 of 32 random bytes."""
    return PREFIX + base64.b64encode(secrets.token_bytes(32)).decode()


def sign(secret: str, msg_id: str, timestamp: int, body: str) -> str:
    """The webhook-signature header value: v1,<base64 HMAC-SHA256>."""
    key = base64.b64decode(secret.removeprefix(PREFIX))
    mac = hmac.new(key, f"{msg_id}.{timestamp}.{body}".encode(), hashlib.sha256).digest()
    return "v1," + base64.b64encode(mac).decode()


def headers(secret: str, msg_id: str, timestamp: int, body: str) -> dict[str, str]:
    """The three Standard Webhooks headers plus the content type."""
    return {
        "webhook-id": msg_id,
        "webhook-timestamp": str(timestamp),
        "webhook-signature": sign(secret, msg_id, timestamp, body),
        "content-type": "application/json",
    }
