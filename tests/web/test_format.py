"""How pages write times, ages and numbers."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest

from service.web import format

NOW = datetime(2026, 12, 1, 3, 0, tzinfo=UTC)


@pytest.mark.parametrize(
    "delta, text",
    [
        (timedelta(seconds=20), "just now"),
        (timedelta(minutes=12), "12 min ago"),
        (timedelta(hours=3, minutes=5), "3 h 5 min ago"),
        (timedelta(hours=2), "2 h ago"),
        (timedelta(days=2, hours=4, minutes=59), "2 d 4 h ago"),
        (-timedelta(minutes=5), "in 5 min"),
    ],
)
def test_age_text(delta: timedelta, text: str) -> None:
    assert format.age_text(NOW - delta, NOW) == text


def test_times_are_utc_whatever_the_input_zone() -> None:
    assert format.utc_text("2026-12-01T02:45:00Z") == "2026-12-01 02:45 UTC"
    assert format.utc_text("2026-12-01T03:45:00+01:00") == "2026-12-01 02:45 UTC"
    assert format.utc_text("2026-12-01T02:45:09Z", seconds=True) == "2026-12-01 02:45:09 UTC"
    assert format.utc_text(None) == format.DASH
    assert format.age_text("2026-12-01T02:48:00Z", NOW) == "12 min ago"


@pytest.mark.parametrize(
    "value, text",
    [
        (0.31234, "0.312"),
        (3000.0, "3,000"),
        (1840000, "1,840,000"),
        (1234.56, "1,235"),
        (-0.0021, "-0.0021"),
        (0.00001234, "1.23e-05"),
        (0.0, "0"),
        (None, "–"),
        (float("nan"), "–"),
    ],
)
def test_num(value: float | None, text: str) -> None:
    assert format.num(value) == text


def test_units_and_p_values() -> None:
    assert format.pct(0.0287) == "2.9 %"
    assert format.count(1840000, "rows") == "1,840,000 rows"
    assert format.pvalue(1e-20) == "p < 1e-16"
    assert format.pvalue(0.00012) == "p = 1.2e-04"
    assert format.pvalue(0.0312) == "p = 0.031"
    assert format.milliseconds(6.54) == "6.5 ms" and format.milliseconds(123.4) == "123 ms"
    assert format.signed(0.337) == "+0.337" and format.signed(-0.01) == "-0.01"
    assert format.duration_text(3725) == "1 h 2 min"


def test_stable_links_keep_keys_readable_and_safe() -> None:
    assert (
        format.snapshot_url("shelf-ranker", "2026-12-01T02:45Z")
        == "/ui/models/shelf-ranker/snapshots/2026-12-01T02:45Z"
    )
    assert format.snapshot_url("m", "a b?c#d") == "/ui/models/m/snapshots/a%20b%3Fc%23d"


def test_state_text() -> None:
    assert format.state_text({"decision": "hold", "baseline": None, "override_id": 3}) == (
        "decision hold, baseline none"
    )
    assert format.state_text(None) == format.DASH
