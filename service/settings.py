"""Settings, declared once: each has a default and a help string, read from ``TIDEGATE_*``
environment variables (or a ``.env`` file), and documented in the README (a test checks).
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import Field
from pydantic_settings import BaseSettings, SettingsConfigDict


class Settings(BaseSettings):
    model_config = SettingsConfigDict(
        env_prefix="TIDEGATE_", env_file=".env", extra="ignore", frozen=True
    )

    database_url: str = Field(
        "sqlite:///./tidegate.db",
        description="SQLAlchemy URL of the database: a SQLite file (default) or PostgreSQL "
        "(postgresql+psycopg://user@host/db).",
    )
    policy_dir: Path | None = Field(
        None,
        description="Folder of policy TOML files; unset: the packaged starter policy judges "
        "every model.",
    )
    migrate_on_start: bool = Field(
        False, description="Upgrade the database to the current revision when the service starts."
    )
    sqlite_busy_timeout_ms: int = Field(
        10000, ge=0, description="How long a SQLite writer waits for the lock, in milliseconds."
    )
    sqlite_synchronous: Literal["FULL", "NORMAL", "EXTRA"] = Field(
        "FULL",
        description="SQLite synchronous level; FULL makes every acknowledged commit durable "
        "in WAL mode.",
    )
    history_limit: int = Field(
        200, ge=0, le=10000, description="Earlier verdicts of a model handed to the gate."
    )
    max_body_bytes: int = Field(
        64 * 1024 * 1024, ge=1024, description="Largest request body accepted, in bytes."
    )
    max_rows: int = Field(2_000_000, ge=1, description="Most sample rows in one post.")
    max_columns: int = Field(64, ge=1, description="Most sample columns in one post.")
    max_string_length: int = Field(
        200, ge=1, description="Longest text value in a sample column, key, tag or metric name."
    )
    auth: Literal["tokens", "open"] = Field(
        "tokens",
        description="tokens: every request needs an API token; open: no checks (demo and local "
        "development only; a warning is printed at start).",
    )
    retention_days: int | None = Field(
        None, ge=1, description="Prune raw samples older than this many days (None: keep all)."
    )
    log_level: str = Field("INFO", description="Log level of the service.")
    shutdown_grace_seconds: int = Field(
        30,
        ge=0,
        description="On SIGTERM, how long requests in flight may take to finish before "
        "the service stops anyway, in seconds.",
    )
