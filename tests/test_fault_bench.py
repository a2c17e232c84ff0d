"""The fault bench's quick run (bench/faults.py --quick): seeded, through the real store and
gate, for the starter policy and every worked policy of the README. The counts asserted are the
run's design (how many pushes of each kind) and what a policy must catch whatever its limits
(lineage, health); the rates of the full run are published in the README, not asserted here."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "bench"))

import faults  # noqa: E402

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def results() -> dict[str, faults.PolicyResult]:
    policies = faults.bench_policies(None)
    ran = faults.run_all(policies, faults.QUICK, 20261202, jobs=2)
    return {r.policy: r for r in ran}


def test_every_policy_of_the_readme_and_the_starter_ran(
    results: dict[str, faults.PolicyResult],
) -> None:
    assert set(results) == {
        "starter",
        "also-read",
        "default",
        "shelf-ranker",
        "examples/quality-policy",
    }
    for result in results.values():
        assert result.error is None, result.error


def test_the_simulated_stream_is_as_specified(results: dict[str, faults.PolicyResult]) -> None:
    r = results["starter"]
    # Consecutive snapshots share most of their errors (logit correlation at least 0.99) and
    # the top-10 lists turn over by about 10 % a push (issue 9, item 8; common practice).
    assert r.correlation >= 0.99
    assert 0.05 <= r.turnover <= 0.15
    assert r.rows == 5000


def test_counts_of_the_quick_run(results: dict[str, faults.PolicyResult]) -> None:
    for result in results.values():
        s = faults.summarise(result)
        assert s.healthy == faults.QUICK.healthy == 30
        assert set(s.detection) == {
            (k, w) for k in faults.FAULT_SIZES for w in ("blatant", "near-floor")
        }
        assert all(total == 1 for _, total in s.detection.values())
        # Whatever the limits: a replay behind the baseline, or behind a held snapshot, is held
        # on lineage; 1 % NaN scores on health; a std of 1e-4 on health.
        for which in ("blatant", "near-floor"):
            assert s.detection[("stale", which)] == (1, 1), result.policy
            assert "lineage.watermark" in s.caught_by[("stale", which)]
        assert s.detection[("nan-burst", "blatant")] == (1, 1)
        assert s.detection[("collapse", "blatant")] == (1, 1)
        assert "health.collapse" in s.caught_by[("collapse", "blatant")]
        assert s.median_ms > 0


def test_the_starter_policy_at_quick_scale(results: dict[str, faults.PolicyResult]) -> None:
    s = faults.summarise(results["starter"])
    blatant = [s.detection[(k, "blatant")] for k in faults.FAULT_SIZES]
    assert sum(g for g, _ in blatant) == len(faults.FAULT_SIZES)
    (creep,) = s.creeps
    assert creep.kind == "calibration" and creep.single_push is not None
    assert creep.held_step is not None and creep.held_step <= creep.bound_step == 12
