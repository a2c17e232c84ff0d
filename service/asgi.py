"""The app for ASGI servers that import it by name (``tidegate serve --workers N``; or
``uvicorn --factory service.asgi:app_from_environment``): settings come from the environment."""

from __future__ import annotations

from fastapi import FastAPI

from service.app import create_app
from service.settings import Settings


def app_from_environment() -> FastAPI:
    settings = Settings()
    from service import logs

    logs.configure(settings.log_level)
    return create_app(settings)
