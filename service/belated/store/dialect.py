"""The one place that knows which store a session talks to, and how each spells SQL."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session


def is_postgres(session: Session) -> bool:
    """True when the session talks to PostgreSQL (else SQLite)."""
    return session.get_bind().dialect.name == "postgresql"


def upsert(session: Session, table: Any) -> Any:
    """An INSERT that can take ON CONFLICT clauses, in the session's dialect."""
    return (postgresql if is_postgres(session) else sqlite).insert(table)


def json_path(key: str) -> str:
    """SQLite's JSON path of a top-level key, quoted."""
    return '$."' + key.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _spellable(key: str) -> bool:
    # a key with quotes, backslashes or control characters cannot be spelled in a path
    return not any(c in key for c in '"\\') and all(ord(c) >= 32 for c in key)


@dataclass(frozen=True)
class Dialect:
    """SQL spellings that differ between PostgreSQL and SQLite."""

    postgres: bool

    @classmethod
    def of(cls, session: Session) -> Dialect:
        """The dialect of a session's store."""
        return cls(is_postgres(session))

    def least(self, a: str, b: str) -> str:
        """The smaller of two values."""
        return f"LEAST({a}, {b})" if self.postgres else f"min({a}, {b})"

    def greatest(self, a: str, b: str) -> str:
        """The larger of two values."""
        return f"GREATEST({a}, {b})" if self.postgres else f"max({a}, {b})"

    def floor_int(self, a: str) -> str:
        """floor(a) as an integer, for a >= 0 (where SQLite's truncating cast is floor)."""
        return f"CAST(floor({a}) AS INTEGER)" if self.postgres else f"CAST({a} AS INTEGER)"

    def tag(self, key: str, param: str) -> tuple[str, dict[str, Any]]:
        """The SQL of a prediction's value for tag `key` (NULL when absent), and its bind
        parameters, all named after `param`."""
        if self.postgres:
            return f"(tags ->> :{param})", {param: key}
        if _spellable(key):
            return f"json_extract(tags, :{param})", {param: json_path(key)}
        return (
            f"(SELECT j.value FROM json_each(predictions.tags) AS j WHERE j.key = :{param})",
            {param: key},
        )

    def timestamp(self, value: datetime) -> Any:
        """A timestamp bind parameter compared with a stored UTC timestamp column."""
        if self.postgres:
            return value
        return value.strftime("%Y-%m-%d %H:%M:%S.%f")  # the text form SQLAlchemy stores
