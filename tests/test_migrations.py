"""Migrations: upgrade -> downgrade -> upgrade on an empty database, and no drift between the
tables and the migrated schema (autogenerate finds nothing)."""

from __future__ import annotations

import os
import uuid
from pathlib import Path

import pytest
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from sqlalchemy import create_engine, text

from service.app import create_app
from service.settings import Settings
from service.store import db
from service.store.tables import Base
from tests.conftest import skip_or_fail


def roundtrip(settings: Settings) -> None:
    db.upgrade(settings)
    db.downgrade(settings, "base")
    engine = db.make_engine(settings)
    assert db.current_revision(engine) is None
    db.upgrade(settings)
    assert db.current_revision(engine) == db.head_revision(settings)
    with engine.connect() as conn:
        diff = compare_metadata(
            MigrationContext.configure(conn, opts={"compare_type": True}), Base.metadata
        )
    assert diff == []
    engine.dispose()


def test_sqlite_roundtrip(tmp_path: Path) -> None:
    roundtrip(Settings(database_url=f"sqlite:///{tmp_path / 'm.db'}"))


def test_postgres_roundtrip() -> None:
    url = os.environ.get("TIDEGATE_TEST_POSTGRES_URL")
    if not url:
        skip_or_fail("TIDEGATE_TEST_POSTGRES_URL is not set")
    name = f"tg_mig_{uuid.uuid4().hex[:10]}"
    admin = create_engine(url, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.execute(text(f"CREATE DATABASE {name}"))
    except Exception as exc:  # pragma: no cover - depends on the machine
        skip_or_fail(f"PostgreSQL not reachable at {url}: {exc}")
    try:
        roundtrip(Settings(database_url=url.rsplit("/", 1)[0] + f"/{name}"))
    finally:
        with admin.connect() as conn:
            conn.execute(text(f"DROP DATABASE IF EXISTS {name} WITH (FORCE)"))
        admin.dispose()


def test_service_refuses_an_unmigrated_database(tmp_path: Path) -> None:
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'empty.db'}")
    with pytest.raises(db.DatabaseNotReady, match="tidegate db upgrade"):
        create_app(settings)


def test_migrate_on_start(tmp_path: Path) -> None:
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'auto.db'}", migrate_on_start=True)
    app = create_app(settings)
    assert db.current_revision(app.state.engine) == db.head_revision(settings)
    assert db.storage_settings(app.state.engine)["journal_mode"] == "wal"
    assert db.storage_settings(app.state.engine)["synchronous"] == "FULL"
