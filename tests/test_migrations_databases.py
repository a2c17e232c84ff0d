"""Migrations on both databases (issue 6): upgrade -> downgrade -> upgrade on an empty
database, and autogenerate finds no difference between the tables and the migrated schema."""

from __future__ import annotations

import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import create_engine, inspect, text

from service.settings import Settings
from service.store import db as store_db
from service.store.tables import Base
from tests.databases import postgres_schema_url


@pytest.fixture(params=["sqlite", "postgresql"])
def empty_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'empty.db'}"
        return
    database = request.getfixturevalue("postgres_database")
    engine = create_engine(database)
    schema = "m_" + uuid.uuid4().hex[:12]
    with engine.begin() as conn:
        conn.execute(text(f'CREATE SCHEMA "{schema}"'))
    try:
        yield postgres_schema_url(database, schema)
    finally:
        with engine.begin() as conn:
            conn.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        engine.dispose()


def tables(url: str) -> set[str]:
    engine = create_engine(url)
    with engine.connect() as conn:
        names = set(inspect(conn).get_table_names())
    engine.dispose()
    return names


def test_upgrade_downgrade_upgrade_and_no_drift(empty_url: str) -> None:
    settings = Settings(database_url=empty_url)
    expected = set(Base.metadata.tables) | {"alembic_version"}
    store_db.upgrade(settings)
    assert tables(empty_url) == expected
    store_db.downgrade(settings, "base")
    assert tables(empty_url) <= {"alembic_version"}
    store_db.upgrade(settings)
    engine = store_db.make_engine(settings)
    assert store_db.current_revision(engine) == store_db.head_revision(settings)
    with engine.connect() as conn:
        context = MigrationContext.configure(conn, opts={"compare_type": True})
        diff = compare_metadata(context, Base.metadata)
    engine.dispose()
    assert diff == [], diff
