"""The on-call pages in a real browser against the real service (issue 5, part 4).

uvicorn runs the app in a subprocess on a free 127.0.0.1 port over a temporary SQLite file; the
generated history is posted through the HTTP API; headless Chromium (Debian's ``chromium`` and
``chromedriver``, never a downloaded browser) is driven through selenium. Screenshots go to
``tests/artifacts/`` (not committed). Without chromium the tests skip, or fail under
``TIDEGATE_REQUIRE_ALL=1``.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import skip_or_fail
from tests.oncall_support import LiveService, live_service

pytestmark = pytest.mark.browser

ARTIFACTS = Path(__file__).resolve().parent.parent / "artifacts"
CHROMIUM = "/usr/bin/chromium"
CHROMEDRIVER = "/usr/bin/chromedriver"


def _browser_or_skip(profile: Path) -> Any:
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        skip_or_fail("selenium is not installed (pip install selenium)")
    chromium = CHROMIUM if Path(CHROMIUM).exists() else shutil.which("chromium")
    driver = CHROMEDRIVER if Path(CHROMEDRIVER).exists() else shutil.which("chromedriver")
    if not chromium or not driver:
        skip_or_fail(
            "chromium and chromedriver are not installed "
            "(Debian: apt-get install chromium chromium-driver)"
        )
    options = webdriver.ChromeOptions()
    options.binary_location = str(chromium)
    for arg in (
        "--headless=new",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-dev-shm-usage",
        f"--user-data-dir={profile}",
        "--window-size=1280,1000",
        "--hide-scrollbars",
    ):
        options.add_argument(arg)
    return webdriver.Chrome(service=Service(str(driver)), options=options)


@pytest.fixture(scope="module")
def service(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LiveService]:
    with live_service(tmp_path_factory.mktemp("live")) as running:
        yield running


@pytest.fixture(scope="module")
def browser(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    driver = _browser_or_skip(tmp_path_factory.mktemp("chromium-profile"))
    driver.set_page_load_timeout(30)
    try:
        yield driver
    finally:
        driver.quit()


def wait_for(driver: Any, condition: Any, what: str) -> Any:
    """Wait (at most 20 s) until *condition(driver)* is truthy: a click that submits a form
    returns before the next page has loaded."""
    from selenium.webdriver.support.ui import WebDriverWait

    return WebDriverWait(driver, 20).until(condition, message=f"waiting for {what}")


def screenshot(driver: Any, name: str) -> Path:
    """The first screen as ``NAME-top.png`` and the whole page as ``NAME.png``."""
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    driver.set_window_size(1280, 1000)
    driver.execute_script("window.scrollTo(0, 0)")
    driver.save_screenshot(str(ARTIFACTS / f"{name}-top.png"))
    height = driver.execute_script("return document.documentElement.scrollHeight")
    driver.set_window_size(1280, min(int(height) + 40, 8000))
    path = ARTIFACTS / f"{name}.png"
    driver.save_screenshot(str(path))
    driver.set_window_size(1280, 1000)
    return path


def test_held_verdict_override_shows_on_timeline(service: LiveService, browser: Any) -> None:
    from selenium.webdriver.common.by import By

    # 1. the model list: the held model first, its last verdict the held one
    browser.get(service.url + "/")
    assert browser.title.startswith("Models")
    rows = browser.find_elements(By.CSS_SELECTOR, "table.models tbody tr")
    assert "shelf-ranker" in rows[0].text and "held" in rows[0].text
    assert "1 hold in a row" in rows[0].text
    screenshot(browser, "models")

    # 2. click into the held verdict
    rows[0].find_element(By.CSS_SELECTOR, "a[href$='/snapshots/s04']").click()
    wait_for(browser, lambda d: d.current_url.endswith("/snapshots/s04"), "the verdict page")
    assert browser.current_url == service.url + "/ui/models/shelf-ranker/snapshots/s04"
    assert browser.find_element(By.CSS_SELECTOR, "#decision .word").text == "HELD"
    answers = browser.find_element(By.ID, "answers").text
    assert "score PSI" in answers and "exceeds 0.1" in answers
    assert "clear" in answers and "mean score" in answers

    # 3. the chart is there, drawn by the browser with visible bars of both sides
    chart = browser.find_element(By.CSS_SELECTOR, ".only-wide svg.tg-hist")
    assert chart.size["width"] > 600
    for side in ("tg-cand", "tg-base"):
        bars = browser.find_elements(By.CSS_SELECTOR, f".only-wide svg.tg-hist g.{side} rect")
        assert len(bars) == 30
        assert max(b.size["height"] for b in bars) > 50
    screenshot(browser, "verdict-held")

    # 4. an override without a reason is refused and nothing is stored
    browser.find_element(By.CSS_SELECTOR, "form[action$='/override'] button").click()
    error = wait_for(browser, lambda d: d.find_elements(By.ID, "form-error"), "the form error")
    assert "a reason is required" in error[0].text
    assert browser.find_elements(By.CSS_SELECTOR, ".note-over") == []

    # 5. override to promote with a reason
    browser.find_element(By.CSS_SELECTOR, "input[name=decision][value=promote]").click()
    browser.find_element(By.ID, "reason").send_keys("planned catalogue relaunch, ticket 4711")
    browser.find_element(By.CSS_SELECTOR, "form[action$='/override'] button").click()
    wait_for(browser, lambda d: d.current_url.endswith("?done=override"), "the saved override")
    assert browser.current_url.endswith("/ui/models/shelf-ranker/snapshots/s04?done=override")
    assert browser.find_element(By.CSS_SELECTOR, "#decision .word").text == "PROMOTED"
    note = browser.find_element(By.CSS_SELECTOR, ".note-over").text
    assert "Override to promote" in note and "ticket 4711" in note
    assert "serving now" in browser.find_element(By.ID, "decision").text
    screenshot(browser, "verdict-overridden")

    # 6. the override on the model's timeline, strip and baseline history
    browser.find_element(By.CSS_SELECTOR, ".crumbs a[href='/ui/models/shelf-ranker']").click()
    wait_for(browser, lambda d: d.find_elements(By.CSS_SELECTOR, "table.timeline"), "the model")
    row = next(
        r
        for r in browser.find_elements(By.CSS_SELECTOR, "table.timeline tbody tr")
        if "s04" in r.text
    )
    assert "overridden to promote" in row.text and "ticket 4711" in row.text
    assert len(browser.find_elements(By.CSS_SELECTOR, "svg.tg-strip rect.tg-overridden")) == 1
    assert len(browser.find_elements(By.CSS_SELECTOR, ".only-wide svg.tg-trend")) == 3
    history = browser.find_element(By.ID, "baseline").find_element(By.XPATH, "following::table")
    assert "operator override" in history.text
    screenshot(browser, "model")


def test_rollback_from_the_model_page(service: LiveService, browser: Any) -> None:
    from selenium.webdriver.common.by import By

    browser.get(service.url + "/ui/models/shelf-ranker")
    field = browser.find_element(By.CSS_SELECTOR, "form[action$='/baseline'] input[name=snapshot]")
    field.clear()
    field.send_keys("s02")
    browser.find_element(By.CSS_SELECTOR, "form[action$='/baseline'] textarea").send_keys(
        "s03 and s04 share a broken feature join"
    )
    browser.find_element(By.CSS_SELECTOR, "form[action$='/baseline'] button").click()
    wait_for(browser, lambda d: d.current_url.endswith("?done=rollback"), "the roll-back")
    assert "Baseline changed" in browser.find_element(By.CSS_SELECTOR, ".note-done").text
    serving = browser.find_element(By.CSS_SELECTOR, ".grid4 .card").text
    assert "s02" in serving
    actions = browser.find_element(By.ID, "audit").find_element(By.XPATH, "following::table")
    assert "baseline.rollback" in actions.text and "broken feature join" in actions.text
    screenshot(browser, "model-after-rollback")
