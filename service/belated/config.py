"""Settings read from the environment (prefix BELATED_) and a .env file."""

from __future__ import annotations

from functools import lru_cache
from typing import Literal

from pydantic import Field, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict


class Settings(BaseSettings):
    """Every knob of the service; see the README's Configuration table."""

    model_config = SettingsConfigDict(env_prefix="BELATED_", env_file=".env", extra="ignore")

    database_url: str = "sqlite:///./belated.db"
    refresh_seconds: float = Field(60.0, gt=0)
    host: str = "127.0.0.1"
    port: int = Field(8000, ge=0, le=65535)
    jobs: bool = True
    read_only: bool = False  # serve stale-ok reads from a replica: no writes, no jobs
    log_format: Literal["text", "json"] = "text"
    max_batch: int = Field(10_000, ge=1, le=1_000_000)
    max_body_bytes: int = Field(16 * 1024 * 1024, ge=1024)
    max_segment_values: int = Field(100, ge=1, le=10_000)
    webhook_private: bool = True

    @field_validator("database_url")
    @classmethod
    def _normalise_url(cls, value: str) -> str:
        """Route PostgreSQL URLs to the psycopg 3 driver and refuse unknown stores early."""
        value = value.strip()
        for prefix in ("postgres://", "postgresql://", "postgresql+psycopg2://"):
            if value.startswith(prefix):
                return "postgresql+psycopg://" + value[len(prefix) :]
        if value.startswith(("postgresql+psycopg://", "sqlite://")):
            return value
        raise ValueError(
            "BELATED_DATABASE_URL must be sqlite:///path/to/file.db or "
            "postgresql://user@host:port/dbname"
        )


@lru_cache
def get_settings() -> Settings:
    """The process-wide settings, read once."""
    return Settings()
