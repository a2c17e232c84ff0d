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


# Database fixtures (SQLite and PostgreSQL), apps with tokens: see tests/databases.py.
pytest_plugins = ["tests.databases"]
