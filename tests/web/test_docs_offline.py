"""``/docs`` in a real browser with no network (issue 12): every name but 127.0.0.1 fails to
resolve, so a page that fetched its scripts from a CDN would stay blank. The page must list
the API's operations, and the browser must report no Content-Security-Policy violation."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from tests.serverproc import Server
from tests.web.test_browser import ARTIFACTS, _browser_or_skip, wait_for

pytestmark = pytest.mark.browser


@pytest.fixture
def offline_browser(tmp_path: Path) -> Iterator[Any]:
    from selenium.webdriver import ChromeOptions

    real = ChromeOptions.__init__

    def offline(self: Any) -> None:
        real(self)
        # no name resolves except the service's own address: the network is off for the page
        self.add_argument("--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1")
        self.set_capability("goog:loggingPrefs", {"browser": "ALL"})

    ChromeOptions.__init__ = offline  # type: ignore[method-assign]
    try:
        driver = _browser_or_skip(tmp_path / "profile")
    finally:
        ChromeOptions.__init__ = real  # type: ignore[method-assign]
    driver.set_page_load_timeout(120)
    try:
        yield driver
    finally:
        driver.quit()


def test_docs_render_their_operations_offline(
    sqlite_url: str, tmp_path: Path, offline_browser: Any
) -> None:
    from selenium.common.exceptions import WebDriverException
    from selenium.webdriver.common.by import By

    driver = offline_browser
    with Server(sqlite_url, tmp_path) as server:
        # the network really is off for this browser: another site does not load
        with pytest.raises(WebDriverException, match="ERR_NAME_NOT_RESOLVED"):
            driver.get("https://cdn.jsdelivr.net/npm/swagger-ui-dist@5/swagger-ui.css")
        driver.get(f"{server.url}/docs")
        operations = wait_for(
            driver,
            lambda d: (
                d.find_elements(By.CSS_SELECTOR, ".opblock-summary-path")
                if len(d.find_elements(By.CSS_SELECTOR, ".opblock-summary-path")) >= 10
                else None
            ),
            "the operations of the API",
        )
        paths = {element.text.replace("\u200b", "") for element in operations}
        assert "/v1/models/{model}/snapshots" in paths
        ARTIFACTS.mkdir(exist_ok=True)
        driver.save_screenshot(str(ARTIFACTS / "docs-offline.png"))
        console = [entry["message"] for entry in driver.get_log("browser")]
    assert not [m for m in console if "Content Security Policy" in m], console
