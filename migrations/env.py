"""Alembic environment: the URL comes from tidegate's settings, never from alembic.ini."""

from __future__ import annotations

from alembic import context

from service.settings import Settings
from service.store.db import make_engine
from service.store.tables import Base

config = context.config
settings: Settings = config.attributes.get("settings") or Settings()
target_metadata = Base.metadata


def run_offline() -> None:
    context.configure(
        url=settings.database_url,
        target_metadata=target_metadata,
        literal_binds=True,
        compare_type=True,
        render_as_batch=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def run_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    engine = make_engine(settings)
    with engine.connect() as conn:
        _run(conn)
    engine.dispose()


def _run(connection: object) -> None:
    context.configure(
        connection=connection,  # type: ignore[arg-type]
        target_metadata=target_metadata,
        compare_type=True,
        render_as_batch=True,
    )
    with context.begin_transaction():
        context.run_migrations()


if context.is_offline_mode():
    run_offline()
else:
    run_online()
