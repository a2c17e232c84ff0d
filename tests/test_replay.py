"""Replay: past snapshots judged again under a stricter and a looser policy."""

from __future__ import annotations

from service.gate.policy import parse_policy
from service.replay import replay
from tests.api.test_snapshots import POLICY, body


def test_replay_counts_and_changes(make_harness) -> None:  # type: ignore[no-untyped-def]
    h = make_harness({"p": POLICY})
    shifts = [0.0, 0.02, 0.3, 0.04, 0.06, 0.0]
    for i, shift in enumerate(shifts):
        h.clock.advance(minutes=15)
        h.post("m", body(f"s{i}", seed=i, shift=shift, minute=15 * (i + 1)))
    stored = {
        v["snapshot"]: v["decision"] for v in h.client.get("/v1/models/m/verdicts").json()["data"]
    }
    database = h.client.app.state.database  # type: ignore[attr-defined]
    same = parse_policy(POLICY, name="same")
    with database.transaction() as session:
        result = replay(session, model_name="m", policy=same, limit=50).to_dict()
    # The same policy on the same inputs reproduces every stored decision.
    assert [r["snapshot"] for r in result["data"]] == [f"s{i}" for i in range(6)]
    assert all(r["replay_decision"] == stored[r["snapshot"]] for r in result["data"])
    assert result["summary"]["changed"] == 0
    assert result["summary"]["held_then"] == sum(d == "hold" for d in stored.values()), stored
    loose = parse_policy(POLICY.replace("max = 0.1", "max = 5.0"), name="loose")
    with database.transaction() as session:
        result = replay(session, model_name="m", policy=loose, limit=50).to_dict()
    assert result["summary"]["held_by_replay"] == 0, result["data"]
    held = {k for k, d in stored.items() if d == "hold"}
    assert "s2" in held
    assert {r["snapshot"] for r in result["data"] if r["changed"]} == held


def test_replay_route_and_errors(make_harness) -> None:  # type: ignore[no-untyped-def]
    h = make_harness({"p": POLICY})
    h.post("m", body("s0", seed=0))
    h.clock.advance(minutes=15)
    h.post("m", body("s1", seed=1, shift=0.3, minute=15))
    r = h.client.post("/v1/models/m/replay", json={"limit": 10})
    assert r.status_code == 200, r.text
    assert r.json()["summary"]["held_then"] == 1 and r.json()["summary"]["changed"] == 0
    r = h.client.post("/v1/models/m/replay", json={"policy": 'models = ["*"]\nbad = 1\n'})
    assert r.status_code == 422
    assert r.json()["error"]["code"] == "invalid_policy"
    assert "key 'bad': unknown key" in r.json()["error"]["message"]
    assert h.client.post("/v1/models/zz/replay", json={}).status_code == 404
    # nothing was stored by replays
    assert len(h.client.get("/v1/models/m/verdicts").json()["data"]) == 2
