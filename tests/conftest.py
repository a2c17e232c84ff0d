"""Shared fixtures.

Tests that need something absent on a user's machine (PostgreSQL, a browser) call
:func:`skip_or_fail`: it skips with the reason, except when ``TIDEGATE_REQUIRE_ALL=1`` (CI sets
it), where the missing piece is a failure, so CI always runs every test.
"""

from __future__ import annotations

import os

import pytest

REQUIRE_ALL = os.environ.get("TIDEGATE_REQUIRE_ALL", "") not in {"", "0", "false", "no"}


def skip_or_fail(reason: str) -> None:
    """Skip with *reason*, or fail when every test is required (CI)."""
    if REQUIRE_ALL:
        pytest.fail(f"required test cannot run (TIDEGATE_REQUIRE_ALL=1): {reason}")
    pytest.skip(reason)


# --- an app on a fresh temporary SQLite file per test ------------------------------------------

import shutil  # noqa: E402
from collections.abc import Callable, Iterator  # noqa: E402
from dataclasses import dataclass  # noqa: E402
from datetime import UTC, datetime, timedelta  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Any  # noqa: E402

from fastapi.testclient import TestClient  # noqa: E402

from service.app import create_app  # noqa: E402
from service.gate.policy import Policy, parse_policy  # noqa: E402
from service.settings import Settings  # noqa: E402
from service.store import db as store_db  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent


class FakeClock:
    """A clock the test moves by hand (the gate and store never read the wall clock in tests)."""

    def __init__(self, start: datetime | None = None) -> None:
        self.now = start or datetime(2026, 12, 1, 2, 0, tzinfo=UTC)

    def __call__(self) -> datetime:
        return self.now

    def advance(self, **kwargs: float) -> datetime:
        self.now += timedelta(**kwargs)
        return self.now


@pytest.fixture(scope="session")
def migrated_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """An empty database at the head revision, copied for each test (faster than migrating)."""
    path = tmp_path_factory.mktemp("template") / "template.db"
    store_db.upgrade(Settings(database_url=f"sqlite:///{path}"))
    return path


@dataclass
class Harness:
    client: TestClient
    clock: FakeClock
    settings: Settings
    db_path: Path

    def post(self, model: str, body: dict[str, Any], **kwargs: Any) -> Any:
        return self.client.post(f"/v1/models/{model}/snapshots", json=body, **kwargs)


@pytest.fixture
def make_harness(tmp_path: Path, migrated_template: Path) -> Iterator[Callable[..., Harness]]:
    """Build an app on a fresh SQLite copy; ``policies`` are TOML texts keyed by name."""
    made: list[TestClient] = []

    def make(policies: dict[str, str] | None = None, **settings_kw: Any) -> Harness:
        path = tmp_path / f"tidegate-{len(made)}.db"
        shutil.copyfile(migrated_template, path)
        settings = Settings(
            database_url=f"sqlite:///{path}",
            policy_dir=ROOT / "config" / "policies",
            auth="open",
            **settings_kw,
        )
        loaded: list[Policy] | None = None
        if policies is not None:
            loaded = [parse_policy(text, name=name) for name, text in policies.items()]
        clock = FakeClock()
        client = TestClient(create_app(settings, policies=loaded, clock=clock))
        made.append(client)
        return Harness(client, clock, settings, path)

    yield make
    for client in made:
        client.close()
