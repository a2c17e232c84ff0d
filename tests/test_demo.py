"""The demo scenario loads through the API and the gate holds each planted bad push."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

from service import demo
from tests.conftest import Harness


def test_demo_holds_the_bad_pushes(make_harness) -> None:  # type: ignore[no-untyped-def]
    h: Harness = make_harness()
    end = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)
    events = demo.scenario(end, hours=12)
    decisions = {}
    for event in events:
        h.clock.now = event.at + timedelta(seconds=30)
        r = h.post(event.model, event.body)
        assert r.status_code == 201, r.text
        decisions[(event.model, event.body["key"])] = (event.note, r.json())
    planted = {k: v for k, v in decisions.items() if v[0]}
    assert {note for note, _ in planted.values()} == {
        "collapse",
        "calibration",
        "nan",
        "stale",
        "recall-drop",
    }
    for (_model, _key), (note, verdict) in planted.items():
        assert verdict["decision"] == "hold", (note, verdict["reasons"])
    healthy = [v for note, v in decisions.values() if not note]
    false_holds = [v for v in healthy if v["decision"] == "hold"]
    # The invented scenario is meant to be calm between the planted faults.
    assert len(false_holds) <= len(healthy) * 0.05, [v["reasons"] for v in false_holds]
