"""Bounded cost of a replay (issue 12): who may ask for one, a work budget checked before any
work, a wall-clock limit, a cap on bootstrap resamples, and one replay at a time per process."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from service import replay as replay_module
from service.app import create_app
from service.gate.policy import PolicyError
from tests.databases import Api, settings_for, snapshot_body

MODEL = "shelf-ranker"


def bootstrap_policy(resamples: int) -> str:
    """Two bootstrap checks (the costly kind); the quality check's keys as in
    config/examples/quality-policy.toml."""
    checks = "".join(
        f"""
[[checks]]
name = "calibration-{i}"
kind = "quality"
metric = "calibration_ratio"
rule = "limit"
margin = 0.02
floor = 0.5
ceiling = 2.0
method = "bootstrap"
resamples = {resamples}
"""
        for i in (1, 2)
    )
    return 'models = ["*"]\n[sample]\nmin_rows = 20\n' + checks


@pytest.fixture
def stored(make_api: Any) -> Any:
    def build(**settings: Any) -> Api:
        api = make_api(**settings)
        for step in range(1, 5):
            assert api.post(MODEL, snapshot_body(f"s{step}", step=step)).status_code == 201
        return api

    return build


def replay(api: Api, token: str | None, **body: Any) -> Any:
    return api.client.post(f"/v1/models/{MODEL}/replay", json=body, headers=api.headers(token))


def counting_evaluations(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    calls: list[int] = []
    real = replay_module.evaluate

    def counted(*args: Any, **kwargs: Any) -> Any:
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(replay_module, "evaluate", counted)
    return calls


def test_replay_needs_the_replay_action(stored: Any) -> None:
    api = stored()
    for role, status in (("viewer", 403), ("trainer", 403), ("operator", 200), ("admin", 200)):
        answer = replay(api, api.token(role), limit=10)
        assert answer.status_code == status, (role, answer.text)
    refused = replay(api, api.token("viewer"), limit=10).json()["error"]
    assert refused["code"] == "forbidden" and "replay" in refused["message"]


def test_resamples_above_the_cap_are_refused(stored: Any) -> None:
    api = stored(max_resamples=5000)
    answer = replay(api, None, policy=bootstrap_policy(100_000), limit=10)
    assert answer.status_code == 422
    error = answer.json()["error"]
    assert error["code"] == "invalid_policy" and "TIDEGATE_MAX_RESAMPLES" in error["message"]
    assert replay(api, None, policy=bootstrap_policy(200), limit=10).status_code == 200


def test_a_replay_over_budget_is_refused_before_any_work(
    stored: Any, monkeypatch: pytest.MonkeyPatch
) -> None:
    # 4 snapshots of 40 rows, judged against baselines of 40 rows (3 of them): 280 rows;
    # 2 checks with 1000 resamples each: 2 + 2000 + 1 passes per row -> 560,840 row-passes
    api = stored(replay_max_work=500_000)
    calls = counting_evaluations(monkeypatch)
    answer = replay(api, None, policy=bootstrap_policy(1000), limit=10)
    assert answer.status_code == 422, answer.text
    error = answer.json()["error"]
    assert error["code"] == "replay_over_budget" and "560,840" in error["message"]
    assert calls == []  # nothing was judged
    # fewer snapshots fit: the last two (80 + 80 rows) -> 320,480
    assert replay(api, None, policy=bootstrap_policy(1000), limit=2).status_code == 200
    assert len(calls) == 2


def test_a_replay_past_its_time_limit_stops(stored: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    api = stored(replay_max_seconds=0.001)
    ticks = iter(range(0, 1000, 1))
    monkeypatch.setattr("service.budget.time.monotonic", lambda: float(next(ticks)))
    answer = replay(api, None, limit=10)
    assert answer.status_code == 422, answer.text
    error = answer.json()["error"]
    assert error["code"] == "replay_time_limit" and "0 of 4 snapshots" in error["message"]


def test_one_replay_at_a_time_then_429(stored: Any) -> None:
    api = stored()
    with api.app.state.replay_slots.hold():
        busy = replay(api, None, limit=10)
    assert busy.status_code == 429
    assert busy.headers["retry-after"] == "10"
    assert busy.json()["error"]["code"] == "busy"
    assert replay(api, None, limit=10).status_code == 200


def test_a_policy_file_above_the_cap_stops_the_start(database_url: str, tmp_path: Path) -> None:
    (tmp_path / "costly.toml").write_text(bootstrap_policy(50_000), "utf-8")
    settings = settings_for(database_url, policy_dir=tmp_path, max_resamples=10_000)
    with pytest.raises(PolicyError, match="TIDEGATE_MAX_RESAMPLES"):
        create_app(settings)
