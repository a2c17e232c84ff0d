"""Retention (issue 6): ``tidegate prune`` deletes old raw samples but keeps those of baselines,
references and unresolved holds, and the evidence of every verdict survives."""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest

from service import cli
from service.store import db as store_db
from service.store import repo
from service.store.tables import SampleColumnRow
from tests.databases import Api, snapshot_body

OLD = datetime(2020, 3, 1, tzinfo=UTC)  # far enough back for any real "now" minus 30 days


@pytest.fixture
def history(make_api: Any, monkeypatch: pytest.MonkeyPatch) -> Api:
    """shelf-ranker, 2020: r (pinned reference), p (promoted, replaced), h1 (held, resolved by a
    later promotion), b (baseline), h2 (held, then overridden), h3 (held, unresolved)."""
    clock = {"now": OLD}
    api = make_api(clock=lambda: clock["now"])
    monkeypatch.setenv("TIDEGATE_DATABASE_URL", api.settings.database_url)
    plan = [("r", 0.0), ("p", 0.0), ("h1", 0.5), ("b", 0.0), ("h2", 0.5), ("h3", 0.5)]
    for step, (key, shift) in enumerate(plan):
        clock["now"] = OLD + timedelta(minutes=15 * step)
        response = api.post("shelf-ranker", snapshot_body(key, step=step, shift=shift))
        assert response.status_code == 201, response.text
        expected = "hold" if shift else "promote"
        assert response.json()["decision"] == expected, response.json()["reasons"]
    engine = store_db.make_engine(api.settings)
    with store_db.transaction(store_db.make_sessionmaker(engine)) as session:
        model = repo.get_model(session, name="shelf-ranker")
        assert model is not None
        model.reference_id = repo.get_snapshot(session, model_id=model.id, key="r").id  # type: ignore[union-attr]
        h2 = repo.get_snapshot(session, model_id=model.id, key="h2")
        assert h2 is not None
        verdict = repo.verdict_for_snapshot(session, snapshot_id=h2.id)
        assert verdict is not None
        repo.add_override(
            session,
            verdict_id=verdict.id,
            decision="hold",
            reason="confirmed",
            actor="dana",
            now=OLD + timedelta(hours=3),
        )
    engine.dispose()
    return api


def snapshot(api: Api, key: str) -> dict[str, Any]:
    response = api.client.get(f"/v1/models/shelf-ranker/snapshots/{key}", headers=api.headers())
    assert response.status_code == 200
    return response.json()  # type: ignore[no-any-return]


def verdict(api: Api, key: str) -> dict[str, Any]:
    vid = snapshot(api, key)["verdict_id"]
    return api.client.get(f"/v1/verdicts/{vid}", headers=api.headers()).json()  # type: ignore[no-any-return]


def column_count(api: Api) -> dict[int, int]:
    engine = store_db.make_engine(api.settings)
    with store_db.read_transaction(store_db.make_sessionmaker(engine)) as session:
        rows = session.query(SampleColumnRow.snapshot_id).all()
    engine.dispose()
    out: dict[int, int] = {}
    for (sid,) in rows:
        out[sid] = out.get(sid, 0) + 1
    return out


KEYS = ["r", "p", "h1", "b", "h2", "h3"]


def test_prune_keeps_evidence_and_protected_samples(
    history: Api, capsys: pytest.CaptureFixture[str]
) -> None:
    api = history
    before = {key: (snapshot(api, key), verdict(api, key)) for key in KEYS}
    columns_before = column_count(api)
    assert len(columns_before) == 6

    assert cli.main(["prune", "--days", "30", "--dry-run", "--json"]) == 0
    dry = json.loads(capsys.readouterr().out)
    assert dry["snapshots_pruned"] == 3 and dry["dry_run"] is True
    assert column_count(api) == columns_before  # a dry run changes nothing

    assert cli.main(["prune", "--days", "30", "--json"]) == 0
    done = json.loads(capsys.readouterr().out)
    assert done["snapshots_pruned"] == 3
    assert done["kept_baseline"] == 1 and done["kept_reference"] == 1
    assert done["kept_unresolved_hold"] == 1
    assert done["sample_columns"] == 3 * 3  # score, label, segment.device
    assert done["sample_bytes"] > 0

    for key in KEYS:
        snap_before, verdict_before = before[key]
        snap_after, verdict_after = snapshot(api, key), verdict(api, key)
        # the evidence of every verdict survives: findings, reasons, decision, summary
        assert verdict_after == verdict_before
        assert snap_after["summary"] == snap_before["summary"] is not None
        pruned = key in {"p", "h1", "h2"}
        assert (snap_after["sample_pruned_at"] is not None) == pruned, key
        assert (snap_after["columns"] == []) == pruned, key
        assert snap_after["sample_rows"] == 40

    # a second prune finds nothing more; judging still works against the kept baseline
    assert cli.main(["prune", "--days", "30", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["snapshots_pruned"] == 0
    response = api.post("shelf-ranker", snapshot_body("next", step=9))
    psi = next(f for f in response.json()["findings"] if f["check"] == "score-psi")
    assert psi["outcome"] == "ok" and psi["value"] is not None


def test_prune_keeps_recent_samples_and_needs_a_period(
    history: Api, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    days = (datetime.now(UTC) - OLD).days + 30  # the cut-off falls before every snapshot
    assert cli.main(["prune", "--days", str(days), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["snapshots_pruned"] == 0
    assert cli.main(["prune"]) == cli.EXIT_ERROR
    assert "TIDEGATE_RETENTION_DAYS" in capsys.readouterr().err
    monkeypatch.setenv("TIDEGATE_RETENTION_DAYS", "30")
    assert cli.main(["prune", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["snapshots_pruned"] == 3
