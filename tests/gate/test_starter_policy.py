"""The starter policy (issue 9, item 7): packaged, used when no policy folder is configured,
every check on whose inputs a post carries, the rest skipped with the missing input named."""

from __future__ import annotations

import shutil
from datetime import UTC, datetime, timedelta
from importlib import resources
from pathlib import Path

import numpy as np
from fastapi.testclient import TestClient

from service.app import create_app
from service.gate.evaluate import evaluate
from service.gate.policy import policies_for, select_policy, starter_policy
from service.gate.types import GateInput, Sample, Snapshot
from service.settings import Settings

NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)


def test_starter_is_packaged_and_parses() -> None:
    # Shipped as package data (pyproject [tool.setuptools.package-data]), not read from the repo.
    assert resources.files("service.gate").joinpath("starter.toml").is_file()
    policy = starter_policy()
    assert policy.name == "starter" and policy.models == ("*",)
    assert policy.budget is not None and policy.budget.false_holds_per_1000 == 1
    assert policy.on_underpowered == "promote"
    assert policy.reference.lag_hours == 6 and policy.lineage.watermark_must_advance
    kinds = {c.kind for c in policy.checks}
    assert kinds == {"drift", "paired", "quality", "lists", "skew", "training-volume", "creep"}
    # Every blocking check learns under the budget: the budget is split over all of them.
    assert len(policy.budget_checks()) == len([c for c in policy.checks if c.blocking])
    assert select_policy([policy], "any-model-at-all") is policy


def test_no_policy_folder_means_the_starter_policy() -> None:
    assert [p.name for p in policies_for(None)] == ["starter"]


def test_fresh_service_without_policy_folder_judges_with_the_starter(
    tmp_path: Path, migrated_template: Path
) -> None:
    path = tmp_path / "fresh.db"
    shutil.copyfile(migrated_template, path)
    settings = Settings(database_url=f"sqlite:///{path}", auth="open")
    assert settings.policy_dir is None  # the default: no folder configured
    with TestClient(create_app(settings)) as client:
        listed = client.get("/v1/policies").json()
        assert [p["name"] for p in listed["data"]] == ["starter"]
        scores = np.random.default_rng(1).uniform(0.05, 0.95, 1500).round(4).tolist()
        r = client.post(
            "/v1/models/shelf-ranker/snapshots",
            json={
                "key": "s1",
                "trained_until": "2026-12-01T02:44:00Z",
                "sample": {"score": scores},
            },
        )
        assert r.status_code == 201, r.text
        verdict = r.json()
        assert verdict["decision"] == "promote"
        assert verdict["policy_digest"] == starter_policy().digest


def test_checks_whose_inputs_are_absent_are_skipped_with_the_reason() -> None:
    rng = np.random.default_rng(2)
    policy = starter_policy()

    def snap(key: str, minutes: int) -> Snapshot:
        return Snapshot(
            model="shelf-ranker",
            key=key,
            trained_until=NOW - timedelta(minutes=minutes),
            sample=Sample({"score": rng.uniform(0.05, 0.95, 2000)}),
        )

    verdict = evaluate(GateInput(snap("c", 0), snap("b", 15), NOW), policy)
    by_check = {f.check: f for f in verdict.findings}
    expected = {
        "paired-change": "baseline_score",
        "paired-rank-correlation": "baseline_score",
        "auc": "labels",
        "logloss": "labels",
        "shown-popularity": "lists",
        "exposure-gini": "lists",
        "catalog-coverage": "lists",
        "serving-skew": "served_score",
        "rows-trained": "rows_trained",
        "score-mean-shift-vs-reference": "reference",
        "calibration-vs-reference": "labels",
    }
    for check, missing in expected.items():
        finding = by_check[check]
        assert finding.outcome == "skipped", (check, finding.message)
        assert missing in finding.message, (check, finding.message)
    # The checks a score-only post does carry inputs for ran, and an unchanged model promotes.
    assert by_check["score-psi"].outcome == "ok"
    assert by_check["score-mean-shift"].outcome == "ok"
    assert verdict.decision == "promote"


def test_the_folder_fallback_is_the_starter_with_a_held_first_snapshot() -> None:
    # config/policies/default.toml is the worked fallback of the README: the starter's checks,
    # budget and rules, except that a new model waits for a person.
    path = Path(__file__).resolve().parents[2] / "config" / "policies" / "default.toml"
    fallback = policies_for(path.parent)
    default = next(p for p in fallback if p.name == "default")
    starter = starter_policy()
    assert default.first_snapshot == "hold" and starter.first_snapshot == "promote-if-healthy"
    assert default.checks == starter.checks
    assert default.budget == starter.budget and default.sample == starter.sample
    assert default.reference == starter.reference and default.lineage == starter.lineage
