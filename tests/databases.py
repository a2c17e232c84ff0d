"""Fixtures giving each test its own migrated database: a SQLite file, or a PostgreSQL schema.

``database_url`` is parametrised over both back ends, so a test that takes it (directly or
through ``make_app`` / ``api``) runs on SQLite and on PostgreSQL. PostgreSQL comes from
``TIDEGATE_TEST_POSTGRES_URL``; when it is unset or unreachable the PostgreSQL half skips
(fails under ``TIDEGATE_REQUIRE_ALL=1``, as in CI).

One test session makes one PostgreSQL database with a random name (dropped at the end); each
test gets a fresh schema in it, selected with ``search_path`` in the URL, so tests never collide,
not even two sessions running at once.
"""

from __future__ import annotations

import os
import shutil
import uuid
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from fastapi import FastAPI
from fastapi.testclient import TestClient
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

from service.app import create_app
from service.gate.policy import Policy, parse_policy
from service.settings import Settings
from service.store import db as store_db
from service.store import tokens
from tests.conftest import skip_or_fail

BACKENDS = ["sqlite", "postgresql"]

#: A small policy for tests: 20 rows are enough, and a score PSI above 0.25 holds.
TEST_POLICY_TEXT = """\
models = ["*"]
description = "test policy"
first_snapshot = "promote-if-healthy"

[sample]
min_rows = 20

[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
bins = 5
max = 0.25
"""


def small_policies() -> list[Policy]:
    """The test policy for every model, and copies of it for the two demo models (so that
    listings scoped to one model can be told apart)."""
    out = [parse_policy(TEST_POLICY_TEXT, name="test", path="test.toml")]
    for name, pattern in (("shelf", "shelf-ranker*"), ("also", "also-read")):
        text_ = TEST_POLICY_TEXT.replace('models = ["*"]', f'models = ["{pattern}"]')
        out.append(parse_policy(text_, name=name, path=f"{name}.toml"))
    return out


def postgres_base_url() -> str:
    """The PostgreSQL server URL for tests, or skip (fail in CI)."""
    url = os.environ.get("TIDEGATE_TEST_POSTGRES_URL", "")
    if not url:
        skip_or_fail("TIDEGATE_TEST_POSTGRES_URL is not set")
    try:
        engine = create_engine(url)
        with engine.connect() as conn:
            conn.execute(text("SELECT 1"))
        engine.dispose()
    except Exception as exc:  # unreachable server
        skip_or_fail(f"PostgreSQL at {url} does not answer: {type(exc).__name__}: {exc}")
    return url


@pytest.fixture(scope="session")
def postgres_database() -> Iterator[str]:
    """A database made for this test session (random name), dropped at the end."""
    base = postgres_base_url()
    name = "tidegate_t_" + uuid.uuid4().hex[:12]
    admin = create_engine(base, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'CREATE DATABASE "{name}"'))
    try:
        yield make_url(base).set(database=name).render_as_string(hide_password=False)
    finally:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


def postgres_schema_url(database_url: str, schema: str) -> str:
    """*database_url* with every connection's ``search_path`` set to *schema*."""
    url = make_url(database_url).update_query_dict({"options": f"-csearch_path={schema}"})
    return url.render_as_string(hide_password=False)


@pytest.fixture(scope="session")
def sqlite_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One migrated SQLite file per session; each test copies it (faster than migrating)."""
    path = tmp_path_factory.mktemp("template") / "template.db"
    settings = Settings(database_url=f"sqlite:///{path}")
    store_db.upgrade(settings)
    return path


def new_sqlite_url(template: Path, folder: Path) -> str:
    path = folder / f"tidegate-{uuid.uuid4().hex[:8]}.db"
    shutil.copyfile(template, path)
    return f"sqlite:///{path}"


@pytest.fixture
def new_postgres_url(request: pytest.FixtureRequest) -> Iterator[Callable[[], str]]:
    """Make fresh migrated PostgreSQL schemas on demand (dropped after the test)."""
    made: list[str] = []
    engines: dict[str, Any] = {}

    def make() -> str:
        database = request.getfixturevalue("postgres_database")
        engine = engines.setdefault(database, create_engine(database))
        schema = "t_" + uuid.uuid4().hex[:12]
        with engine.begin() as conn:
            conn.execute(text(f'CREATE SCHEMA "{schema}"'))
        made.append(schema)
        url = postgres_schema_url(database, schema)
        store_db.upgrade(Settings(database_url=url))
        return url

    yield make
    for engine in engines.values():
        with engine.begin() as conn:
            for schema in made:
                conn.execute(text(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE'))
        engine.dispose()


@pytest.fixture(params=BACKENDS)
def database_url(
    request: pytest.FixtureRequest,
    tmp_path: Path,
    sqlite_template: Path,
    new_postgres_url: Callable[[], str],
) -> str:
    """A fresh, migrated database: a SQLite file, or a PostgreSQL schema."""
    if request.param == "sqlite":
        return new_sqlite_url(sqlite_template, tmp_path)
    return new_postgres_url()


@pytest.fixture
def sqlite_url(tmp_path: Path, sqlite_template: Path) -> str:
    """A fresh, migrated SQLite file (for tests about SQLite itself)."""
    return new_sqlite_url(sqlite_template, tmp_path)


@pytest.fixture
def postgres_url(new_postgres_url: Callable[[], str]) -> str:
    """A fresh, migrated PostgreSQL schema (for tests about PostgreSQL itself)."""
    return new_postgres_url()


def settings_for(url: str, **overrides: Any) -> Settings:
    values: dict[str, Any] = {
        "database_url": url,
        "auth": "tokens",
        "policy_dir": Path("config/policies"),
    }
    values.update(overrides)
    return Settings(**values)


def make_token(
    settings: Settings, role: str, models: tuple[str, ...] = ("*",), label: str = ""
) -> tokens.NewToken:
    """Make an API token directly in the database (as ``tidegate token create`` does)."""
    engine = store_db.make_engine(settings)
    try:
        with store_db.transaction(store_db.make_sessionmaker(engine)) as session:
            return tokens.create_token(
                session, role=role, models=models, label=label, actor="cli", now=datetime.now(UTC)
            )
    finally:
        engine.dispose()


@dataclass
class Api:
    """An app on its own database with a test client and an admin token."""

    app: FastAPI
    client: TestClient
    settings: Settings
    admin: str

    def headers(self, token: str | None = None) -> dict[str, str]:
        return {"Authorization": f"Bearer {token or self.admin}"}

    def token(self, role: str, models: tuple[str, ...] = ("*",)) -> str:
        return make_token(self.settings, role, models).secret

    def post(self, model: str, body: dict[str, Any], token: str | None = None) -> Any:
        return self.client.post(
            f"/v1/models/{model}/snapshots", json=body, headers=self.headers(token)
        )


@pytest.fixture
def make_api(database_url: str) -> Iterator[Callable[..., Api]]:
    """Build an app (tokens mode, the test policy) on this test's database."""
    clients: list[TestClient] = []

    def build(*, clock: Callable[[], datetime] | None = None, **overrides: Any) -> Api:
        settings = settings_for(database_url, **overrides)
        extra: dict[str, Any] = {"clock": clock} if clock is not None else {}
        app = create_app(settings, policies=small_policies(), **extra)
        client = TestClient(app, raise_server_exceptions=False)
        clients.append(client)
        admin = make_token(settings, "admin", label="test-admin").secret
        return Api(app, client, settings, admin)

    yield build
    for client in clients:
        client.close()


@pytest.fixture
def api(make_api: Callable[..., Api]) -> Api:
    return make_api()


START = datetime(2026, 12, 1, 0, 0, tzinfo=UTC)


def snapshot_body(
    key: str,
    *,
    step: int = 0,
    rows: int = 40,
    shift: float = 0.0,
    seed: int = 7,
    **extra: Any,
) -> dict[str, Any]:
    """A valid post: *rows* scores in (0, 1) (beta-distributed, seeded), labels, a segment;
    ``trained_until`` advances with *step*; *shift* moves the scores (a large one is held by the
    test policy's PSI limit)."""
    rng = np.random.default_rng(seed)
    score = np.clip(rng.beta(2.0, 5.0, rows) + shift, 0.0, 1.0)
    body: dict[str, Any] = {
        "key": key,
        "trained_until": (START + timedelta(minutes=15 * (step + 1))).isoformat(),
        "metrics": {"auc": 0.75},
        "sample": {
            "score": [round(float(s), 6) for s in score],
            "label": [int(v) for v in rng.integers(0, 2, rows)],
            "segment.device": ["app" if v else "web" for v in rng.integers(0, 2, rows)],
        },
    }
    body.update(extra)
    return body
