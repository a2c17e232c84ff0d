"""Settings, declared once: each has a default and a help string, read from ``TIDEGATE_*``
environment variables (or a ``.env`` file), and documented in the README (a test checks).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Literal

from pydantic import Field, SecretStr
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
        10000,
        ge=0,
        description="How long a SQLite writer waits for the lock held by another process "
        "(the command line, a second server), in milliseconds.",
    )
    sqlite_write_wait_seconds: float = Field(
        300.0,
        gt=0,
        description="How long a write may wait for its turn behind the other writes of the "
        "same process (SQLite; they queue in arrival order), in seconds; past it the answer is "
        "503 with Retry-After.",
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
        128 * 1024 * 1024,
        ge=1024,
        description="Largest request body accepted, in bytes, after Content-Encoding is decoded "
        "(2M rows of five 8-byte columns is 80 MB).",
    )
    heavy_concurrency: int = Field(
        2,
        ge=1,
        le=64,
        description="Heavy jobs (decoding and validating a posted sample, judging it) run at "
        "once per process, each in a worker thread; more wait their turn. About the number of "
        "cores.",
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
    max_resamples: int = Field(
        10_000,
        ge=10,
        description="Most bootstrap resamples a check of a policy may ask for (policy files at "
        "start, inline policies of a replay).",
    )
    replay_max_work: int = Field(
        1_000_000_000,
        ge=1,
        description="Largest replay, in row-passes (sample rows of the replayed snapshots times "
        "the policy's passes over each row: one per check plus its resamples); a larger one is "
        "refused with 422 before any work.",
    )
    replay_max_seconds: float = Field(
        60.0, gt=0, description="Wall-clock limit of one replay, in seconds (then 422)."
    )
    replay_slots: int = Field(
        1, ge=1, le=64, description="Replays that may run at once in one process (then 429)."
    )
    log_level: str = Field("INFO", description="Log level of the service.")
    shutdown_grace_seconds: int = Field(
        30,
        ge=0,
        description="On SIGTERM, how long requests in flight may take to finish before "
        "the service stops anyway, in seconds.",
    )
    public_url: str = Field(
        "http://127.0.0.1:8080",
        description="The address people use to reach this service; links in webhook messages "
        "start with it.",
    )
    webhook_url: str | None = Field(
        None,
        description="Where hold, stuck and override events are posted as signed JSON "
        "(None: no webhook).",
    )
    webhook_secret: SecretStr | None = Field(
        None,
        description="Shared secret for the webhook's HMAC-SHA256 signature (at least 16 "
        "characters; required with a webhook URL).",
    )
    webhook_events: str = Field(
        "hold,stuck,override",
        description="Comma-separated events that are sent: hold, stuck, override.",
    )
    webhook_timeout_seconds: float = Field(
        5.0, gt=0, le=120, description="Time limit of one webhook delivery attempt, in seconds."
    )
    webhook_max_attempts: int = Field(
        8, ge=1, le=50, description="Attempts per webhook message before it is marked failed."
    )
    webhook_backoff_seconds: float = Field(
        2.0,
        gt=0,
        le=3600,
        description="Wait before the first retry of a webhook message; doubles per attempt "
        "(with jitter), capped at one hour.",
    )

    def model_post_init(self, context: Any, /) -> None:
        """Cross-field rules (run once the fields are read): the webhook settings are whole."""
        events = {e.strip() for e in self.webhook_events.split(",") if e.strip()}
        unknown = events - {"hold", "stuck", "override"}
        if unknown:
            raise ValueError(f"webhook_events: unknown event(s) {sorted(unknown)}")
        if self.webhook_url is not None:
            if not self.webhook_url.startswith(("http://", "https://")):
                raise ValueError("webhook_url must start with http:// or https://")
            secret = self.webhook_secret.get_secret_value() if self.webhook_secret else ""
            if len(secret) < 16:
                raise ValueError("webhook_url needs webhook_secret of at least 16 characters")

    def webhook_event_set(self) -> frozenset[str]:
        """The events to send (empty without a webhook URL)."""
        if self.webhook_url is None:
            return frozenset()
        return frozenset(e.strip() for e in self.webhook_events.split(",") if e.strip())
