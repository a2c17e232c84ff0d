"""Structured logs: one JSON object per line, with the request id of the request being served.

Every record carries ``ts`` (UTC, ISO 8601), ``level``, ``logger``, ``message`` and, inside a
request, ``request_id``; fields passed with ``extra={"fields": {...}}`` are added as they are.
"""

from __future__ import annotations

import json
import logging
import logging.config
import math
from contextvars import ContextVar
from datetime import UTC, datetime
from typing import Any

#: The id of the request being served ("" outside a request). Routes run in a thread pool;
#: anyio copies the context into the worker thread, so the id follows the request there.
request_id: ContextVar[str] = ContextVar("tidegate_request_id", default="")


class JsonFormatter(logging.Formatter):
    """A log record as one line of JSON (strict: NaN or Infinity become strings)."""

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "ts": datetime.fromtimestamp(record.created, UTC)
            .isoformat(timespec="milliseconds")
            .replace("+00:00", "Z"),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        rid = request_id.get()
        if rid:
            out["request_id"] = rid
        fields = getattr(record, "fields", None)
        if isinstance(fields, dict):
            for key, value in fields.items():
                out.setdefault(str(key), value)
        if record.exc_info:
            out["exception"] = self.formatException(record.exc_info)
        return json.dumps(_strict(out), default=str, allow_nan=False)


def _strict(value: Any) -> Any:
    """*value* with NaN and infinities written as strings (strict JSON has no literal)."""
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if isinstance(value, dict):
        return {str(k): _strict(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_strict(v) for v in value]
    return value


def log_config(level: str = "INFO") -> dict[str, Any]:
    """A ``logging.config.dictConfig`` that sends tidegate's and uvicorn's records to standard
    error as JSON lines (uvicorn's access log is replaced by our own request log)."""
    handler = {"class": "logging.StreamHandler", "formatter": "json", "stream": "ext://sys.stderr"}
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "formatters": {"json": {"()": JsonFormatter}},
        "handlers": {"json": handler},
        "loggers": {
            "tidegate": {"handlers": ["json"], "level": level.upper(), "propagate": False},
            "uvicorn": {"handlers": ["json"], "level": level.upper(), "propagate": False},
            "uvicorn.error": {"level": level.upper()},
            "uvicorn.access": {"handlers": [], "level": "WARNING", "propagate": False},
        },
        # everything else (alembic, SQLAlchemy warnings, libraries) as JSON too
        "root": {"handlers": ["json"], "level": "WARNING"},
    }


def configure(level: str = "INFO") -> None:
    logging.config.dictConfig(log_config(level))


def fields(**values: Any) -> dict[str, Any]:
    """``log.info("...", extra=fields(model=..., status=...))``."""
    return {"fields": values}
