"""One live service for every test of the client package (started once: a busy machine)."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.client.live import Live, live_service


@pytest.fixture(scope="package")
def live(tmp_path_factory: pytest.TempPathFactory, sqlite_template: Path) -> Iterator[Live]:
    with live_service(tmp_path_factory.mktemp("client-live"), sqlite_template) as running:
        yield running
