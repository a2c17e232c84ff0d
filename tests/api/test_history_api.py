"""Reference pinning and lag, the stuck state in the model list, through the HTTP API and CLI."""

from __future__ import annotations

from typing import Any

import pytest

from service import cli
from tests.api.test_snapshots import body
from tests.conftest import Harness
from tidegate_client import Client as TidegateClient

POLICY = """
models = ["*"]
[sample]
min_rows = 200
[history]
stuck_after_holds = 3
[reference]
lag_hours = 1
[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
max = 0.1
[[checks]]
name = "score-psi-vs-reference"
kind = "drift"
statistic = "psi"
max = 0.1
against = "reference"
"""


def _post(h: Harness, key: str, minute: int, **kw: Any) -> dict[str, Any]:
    h.clock.now = h.clock.now.replace(hour=1 + minute // 60, minute=minute % 60, second=30)
    r = h.post("m", body(key, minute=minute, **kw))
    assert r.status_code == 201, r.text
    return r.json()  # type: ignore[no-any-return]


def _detail(h: Harness, verdict: dict[str, Any]) -> dict[str, Any]:
    return h.client.get(f"/v1/verdicts/{verdict['verdict_id']}").json()  # type: ignore[no-any-return]


def test_lagged_reference_is_the_baseline_as_of_lag_hours_ago(make_harness) -> None:  # type: ignore[no-untyped-def]
    h: Harness = make_harness({"p": POLICY})
    first = _post(h, "s0", 0, seed=0)
    assert _detail(h, first)["reference"] is None  # no baseline an hour before the first
    for i in range(1, 6):
        _post(h, f"s{i}", 15 * i, seed=i)
    # At 02:15:30 the baseline as of 01:15:30 is s1 (promoted at 01:15:30).
    verdict = _post(h, "s6", 75, seed=6)
    assert _detail(h, verdict)["reference"] == "s1"
    finding = next(f for f in verdict["findings"] if f["check"] == "score-psi-vs-reference")
    assert finding["outcome"] == "ok"
    model = h.client.get("/v1/models/m").json()
    assert model["reference"] is None and model["reference_lag_hours"] == 1


def test_pinned_reference_wins_and_is_audited(make_harness) -> None:  # type: ignore[no-untyped-def]
    h: Harness = make_harness({"p": POLICY})
    for i in range(3):
        _post(h, f"s{i}", 15 * i, seed=i)
    r = h.client.put("/v1/models/m/reference", json={"snapshot": "s0", "reason": "before the sale"})
    assert r.status_code == 200, r.text
    assert r.json() == {"model": "m", "reference": "s0", "previous": None}
    verdict = _post(h, "s3", 45, seed=3)
    assert _detail(h, verdict)["reference"] == "s0"
    assert h.client.get("/v1/models/m").json()["reference"] == "s0"
    r = h.client.put("/v1/models/m/reference", json={"snapshot": None, "reason": "sale over"})
    assert r.json() == {"model": "m", "reference": None, "previous": "s0"}


@pytest.mark.parametrize(
    ("payload", "status", "code_field"),
    [
        ({"snapshot": "nope", "reason": "x"}, 404, "snapshot"),
        ({"snapshot": "s0", "reason": ""}, 422, None),
        ({"snapshot": "s0"}, 422, None),
        ({"snapshot": "s0", "reason": "x", "extra": 1}, 422, None),
    ],
)
def test_reference_errors_store_nothing(make_harness, payload, status, code_field) -> None:  # type: ignore[no-untyped-def]
    h: Harness = make_harness({"p": POLICY})
    _post(h, "s0", 0, seed=0)
    r = h.client.put("/v1/models/m/reference", json=payload)
    assert r.status_code == status, r.text
    error = r.json()["error"]
    assert error["code"] and error["message"]
    if code_field:
        assert error["field"] == code_field
    assert h.client.get("/v1/models/m").json()["reference"] is None
    assert (
        h.client.put(
            "/v1/models/nobody/reference", json={"snapshot": "s0", "reason": "x"}
        ).status_code
        == 404
    )


def test_model_list_shows_a_stuck_model(make_harness) -> None:  # type: ignore[no-untyped-def]
    h: Harness = make_harness({"p": POLICY})
    _post(h, "s0", 0, seed=0)
    for i in range(1, 3):
        held = _post(h, f"s{i}", 15 * i, seed=i, shift=0.3)
        assert held["decision"] == "hold"
    assert [f for f in held["findings"] if f["check"] == "history.stuck"] == []  # 2 with it
    _post(h, "s3", 45, seed=3, shift=0.3)
    fourth = _post(h, "s4", 60, seed=4, shift=0.3)
    stuck_finding = next(f for f in fourth["findings"] if f["check"] == "history.stuck")
    assert stuck_finding["outcome"] == "advisory"
    # the same count as the model list: this hold included (issue 14)
    assert stuck_finding["message"] == "stuck: 4 holds in a row; serving a baseline from 1 h ago"
    model = h.client.get("/v1/models").json()["data"][0]
    assert model["stuck"]["stuck"] is True and model["stuck"]["consecutive_holds"] == 4
    assert model["stuck"]["message"].endswith("serving a baseline from 1 h ago")


def test_cli_models_and_reference(make_harness, monkeypatch, capsys) -> None:  # type: ignore[no-untyped-def]
    h: Harness = make_harness({"p": POLICY})
    transport = h.client._transport
    monkeypatch.setattr(
        cli, "_client", lambda _a: TidegateClient("http://testserver", transport=transport)
    )
    _post(h, "s0", 0, seed=0)
    for i in range(1, 4):
        _post(h, f"s{i}", 15 * i, seed=i, shift=0.3)
    assert cli.main(["models"]) == 0
    header, line = capsys.readouterr().out.strip().splitlines()
    assert header.startswith("MODEL ")
    # the word "stuck" once, not "STUCK: stuck: ..." (issue 14)
    assert line.startswith("m ") and "STUCK: 3 holds in a row" in line
    assert line.lower().count("stuck") == 1
    assert cli.main(["reference", "pin", "m", "s0", "--reason", "known good"]) == 0
    assert "reference is now s0" in capsys.readouterr().out
    assert cli.main(["reference", "unpin", "m", "--reason", "done"]) == 0
    assert "was s0" in capsys.readouterr().out
    assert cli.main(["reference", "pin", "m", "nope", "--reason", "x"]) == cli.EXIT_ERROR
