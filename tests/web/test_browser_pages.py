"""Every on-call page in real Chromium at 1,400 px and 390 px (issue 14, item 11).

The demo scenario (12 hours, seeded) is loaded into a temporary SQLite file, the real service
serves it with uvicorn in a subprocess, and Debian's headless Chromium (never a downloaded
browser) opens every page at both widths: no page may scroll sideways
(``document.scrollingElement.scrollWidth <= clientWidth``), and a screenshot of each (its first
screen and the whole page) is written to ``tests/artifacts/`` for CI to keep. A reference
hold's page must name the reference; the audit page's filters must filter.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any
from urllib.parse import quote

import httpx
import pytest

from tests.oncall_support import DemoData, load_demo, running_service
from tests.web.test_browser import ARTIFACTS, _browser_or_skip, wait_for

pytestmark = pytest.mark.browser

#: The two widths of the issue: a laptop window and a phone.
WIDTHS = (1400, 390)


@dataclass
class DemoService:
    url: str
    data: DemoData

    def page(self, model: str, key: str) -> str:
        return f"/ui/models/{model}/snapshots/{quote(key, safe=':@-._~')}"


@pytest.fixture(scope="module")
def browser(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    driver = _browser_or_skip(tmp_path_factory.mktemp("chromium-profile"))
    driver.set_page_load_timeout(120)
    try:
        yield driver
    finally:
        driver.quit()


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory, browser: Any) -> Iterator[DemoService]:
    folder = tmp_path_factory.mktemp("demo")
    data = load_demo(folder)
    with running_service(
        folder, database_url=data.settings.database_url, policy_dir=data.settings.policy_dir
    ) as url:
        yield DemoService(url, data)


def reference_hold(demo: DemoService) -> tuple[str, str]:
    """(snapshot, reference) of the first creep push held by the reference check alone."""
    for key in demo.data.keys("shelf-ranker", "creep"):
        v = demo.data.verdicts[("shelf-ranker", key)]
        failed = {f["check"] for f in v["findings"] if f["outcome"] == "breach" and f["blocking"]}
        if failed == {"score-psi-vs-reference"}:
            reference = httpx.get(f"{demo.url}/v1/verdicts/{v['verdict_id']}").json()
            return key, reference["reference"]
    raise AssertionError("the demo has no hold by the reference check alone")


def every_page(demo: DemoService) -> dict[str, str]:
    """Name -> path of every kind of page the on-call engineer opens."""
    pages = {
        "models": "/ui/",
        "model-shelf-ranker": "/ui/models/shelf-ranker",
        "model-also-read": "/ui/models/also-read",
        "audit": "/ui/audit",
        "report": "/ui/report",
        "report-shelf-ranker": "/ui/report?model=shelf-ranker",
        "not-found": "/ui/no-such-page",
        "sign-in": "/ui/sign-in",
    }
    for model, note in (
        ("shelf-ranker", "collapse"),
        ("shelf-ranker", "calibration"),
        ("shelf-ranker", "nan"),
        ("shelf-ranker", "stale"),
        ("also-read", "recall-drop"),
        ("also-read", "popularity-collapse"),
    ):
        (key,) = demo.data.keys(model, note)
        pages[f"verdict-{note}"] = demo.page(model, key)
    pages["verdict-reference"] = demo.page("shelf-ranker", reference_hold(demo)[0])
    promoted = demo.data.keys("shelf-ranker", "")[-1]
    pages["verdict-promoted"] = demo.page("shelf-ranker", promoted)
    return pages


def shoot(driver: Any, name: str, width: int) -> None:
    """``NAME-WIDTH-top.png`` (the first screen) and ``NAME-WIDTH.png`` (the whole page)."""
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    driver.set_window_size(width, 900)
    driver.execute_script("window.scrollTo(0, 0)")
    driver.save_screenshot(str(ARTIFACTS / f"{name}-{width}-top.png"))
    height = driver.execute_script("return document.documentElement.scrollHeight")
    driver.set_window_size(width, min(int(height) + 40, 8000))
    driver.save_screenshot(str(ARTIFACTS / f"{name}-{width}.png"))
    driver.set_window_size(width, 900)


def test_no_page_scrolls_sideways_at_either_width(demo: DemoService, browser: Any) -> None:
    overflowing = []
    pages = every_page(demo)
    for width in WIDTHS:
        browser.set_window_size(width, 900)
        for name, path in pages.items():
            browser.get(demo.url + path)
            wait_for(
                browser,
                lambda d: d.execute_script("return document.readyState") == "complete",
                name,
            )
            scroll, client = browser.execute_script(
                "const e = document.scrollingElement; return [e.scrollWidth, e.clientWidth]"
            )
            if scroll > client:
                overflowing.append(f"{name} at {width} px: {scroll} > {client}")
            shoot(browser, name, width)
    assert not overflowing, overflowing
    assert len(list(ARTIFACTS.glob("*-390.png"))) >= len(pages)


def test_a_reference_hold_names_the_reference(demo: DemoService, browser: Any) -> None:
    from selenium.webdriver.common.by import By

    key, reference = reference_hold(demo)
    browser.set_window_size(1400, 900)
    browser.get(demo.url + demo.page("shelf-ranker", key))
    judged = browser.find_element(By.ID, "judged").text
    assert f"reference {reference}" in judged
    link = browser.find_element(By.CSS_SELECTOR, f"#judged a[href$='/snapshots/{reference}']")
    assert link.text == reference
    heading = browser.find_element(By.ID, "vs-reference").text
    assert heading == f"Score distributions: candidate vs reference {reference}"
    # the overlay's other side is the reference, drawn in its own colour and named so
    chart = browser.find_element(By.CSS_SELECTOR, "#distribution .only-wide svg.tg-hist")
    bars = chart.find_elements(By.CSS_SELECTOR, "g.tg-ref rect")
    assert len(bars) == 30 and max(b.size["height"] for b in bars) > 30
    assert f"reference {reference}" in chart.find_element(By.CSS_SELECTOR, "text.tg-legend").text
    answers = browser.find_element(By.ID, "answers").text
    assert f"mean score vs reference {reference}" in answers
    shoot(browser, "verdict-reference-detail", 1400)


def test_the_audit_page_filters(demo: DemoService, browser: Any) -> None:
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select

    # an operator action to find among the gate's promotions
    (held,) = demo.data.keys("shelf-ranker", "nan")
    vid = demo.data.verdicts[("shelf-ranker", held)]["verdict_id"]
    answer = httpx.post(
        f"{demo.url}/v1/verdicts/{vid}/override",
        json={"decision": "promote", "reason": "known NaN rows, ticket 4712"},
        headers={"X-Actor": "dana"},
    )
    assert answer.status_code in (200, 201), answer.text
    browser.set_window_size(1400, 900)
    browser.get(demo.url + "/")
    browser.find_element(By.LINK_TEXT, "Audit").click()  # linked from the header
    wait_for(browser, lambda d: d.find_elements(By.ID, "audit-filters"), "the audit page")
    rows = browser.find_elements(By.CSS_SELECTOR, "table.audit tbody tr")
    assert len(rows) > 10
    Select(browser.find_element(By.NAME, "action")).select_by_value("verdict.override")
    browser.find_element(By.CSS_SELECTOR, "#audit-filters button").click()
    wait_for(browser, lambda d: "action=verdict.override" in d.current_url, "the filtered page")
    rows = browser.find_elements(By.CSS_SELECTOR, "table.audit tbody tr")
    assert len(rows) == 1 and "dana" in rows[0].text and "ticket 4712" in rows[0].text
    shoot(browser, "audit-filtered", 1400)
    # by model, from the model page's link
    browser.get(demo.url + "/ui/models/also-read")
    browser.find_element(By.CSS_SELECTOR, "a[href='/ui/audit?model=also-read']").click()
    wait_for(browser, lambda d: "model=also-read" in d.current_url, "the model's audit")
    cells = browser.find_elements(By.CSS_SELECTOR, "table.audit td[data-label=model]")
    assert cells and {c.text for c in cells} == {"also-read"}
    # a time range with nothing in it
    browser.get(demo.url + "/ui/audit?until=2026-11-01T00:00")
    assert "No entries match" in browser.find_element(By.CSS_SELECTOR, "table.audit").text
