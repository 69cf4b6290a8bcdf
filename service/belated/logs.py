"""Logging in text or JSON lines; secrets never reach a log record."""

from __future__ import annotations

import logging
import re

import orjson

_SECRET = re.compile(r"(blt_|whsec_)[A-Za-z0-9_\-+/=]+")


class _Redact(logging.Filter):
    def filter(self, record: logging.LogRecord) -> bool:
        message = record.getMessage()
        if _SECRET.search(message):
            record.msg = _SECRET.sub(r"\1[redacted]", message)
            record.args = ()
        return True


class _Json(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        doc = {
            "ts": self.formatTime(record),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        if record.exc_info:
            doc["exception"] = _SECRET.sub(r"\1[redacted]", self.formatException(record.exc_info))
        return orjson.dumps(doc).decode()


def setup_logging(fmt: str = "text", level: int = logging.INFO) -> None:
    """Configure the root logger once."""
    handler = logging.StreamHandler()
    handler.addFilter(_Redact())
    handler.setFormatter(
        _Json()
        if fmt == "json"
        else logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s")
    )
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(level)
    for noisy in ("apscheduler", "uvicorn.access", "httpx", "httpcore"):
        logging.getLogger(noisy).setLevel(logging.WARNING)
