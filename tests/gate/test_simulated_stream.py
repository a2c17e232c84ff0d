"""A seeded simulated incremental stream (tests/gate/simulated_stream.py): false holds with
static and adaptive limits, and a slow creep that only the reference check catches.

The figures are deterministic for the literal seeds; the bounds below leave room for a
numpy change of random streams without letting the comparison flip.
"""

from __future__ import annotations

import pytest

from tests.gate.simulated_stream import (
    CREEP_STEPS,
    STATIC_PSI,
    creep_stream,
    healthy_stream,
    run_stream,
    stream_policy,
)

WARMUP = 100


@pytest.fixture(scope="module")
def healthy():  # noqa: ANN201 - fixture
    return healthy_stream(200, seed=20261201)


def test_static_limit_holds_healthy_pushes_all_day(healthy) -> None:  # noqa: ANN001
    # The static limit is PSI's 99.9 % point under no change (chi-square approximation,
    # Yurdakul 2018): it ignores the natural drift between retrains, so it holds a large
    # share of healthy pushes.
    assert STATIC_PSI == pytest.approx(0.0186, abs=1e-4)
    static = run_stream(healthy, stream_policy(None))
    assert static.rate() > 0.15


def test_adaptive_limit_learns_the_natural_drift(healthy) -> None:  # noqa: ANN001
    static = run_stream(healthy, stream_policy(None))
    adaptive = run_stream(healthy, stream_policy("robust-z-log"))
    # Warm-up (fewer than min_history = 20 healthy values) falls back to the static limit;
    # after it the learned limit holds almost nothing.
    assert adaptive.rate() < static.rate() / 3
    assert adaptive.rate(50) < 0.03
    warmup_finding = adaptive.finding(0, "score-psi")
    assert "static limit kept" in warmup_finding.message
    late = adaptive.finding(199, "score-psi")
    assert late.details["adaptive"]["used"] is True and late.limit > STATIC_PSI
    # The reference check (24 h lag, PSI 0.1) is nearly quiet on natural drift that does not
    # add up (it only runs once the stream is 24 h old: the last 104 candidates).
    reference_holds = [
        v
        for v in adaptive.verdicts
        for f in v.findings
        if f.check == "score-psi-vs-reference" and f.outcome == "breach"
    ]
    assert len(reference_holds) <= 2


def test_quantile_limit_ratchets_down_when_holds_are_excluded(healthy) -> None:  # noqa: ANN001
    # A high empirical quantile over history that only holds values that passed keeps
    # shrinking (each limit is near the largest value below the last one): the README
    # recommends robust-z; letting overridden holds count breaks the ratchet.
    strict = run_stream(healthy, stream_policy("quantile"))
    lenient = run_stream(healthy, stream_policy("quantile", include_overridden=True))
    assert strict.rate(50) > 2 * lenient.rate(50)


@pytest.mark.parametrize("seed", [7, 8, 9])
def test_slow_creep_passes_each_step_but_the_reference_check_holds_it(seed: int) -> None:
    stream = creep_stream(warmup=WARMUP, seed=seed)
    result = run_stream(stream, stream_policy("robust-z-log"))
    creep = range(WARMUP, WARMUP + CREEP_STEPS)  # verdict i judges snapshot i + 1
    baseline_findings = [result.finding(i, "score-psi") for i in creep]
    reference_findings = [result.finding(i, "score-psi-vs-reference") for i in creep]
    assert all(f.outcome == "ok" for f in baseline_findings)
    caught = [i for i, f in enumerate(reference_findings) if f.outcome == "breach"]
    assert caught, "the reference check never caught the creep"
    assert caught[0] >= 10  # early steps are too small to see...
    assert reference_findings[-1].outcome == "breach"  # ...the whole creep is not


@pytest.mark.parametrize("seed", [7, 8, 9])
def test_the_same_change_in_one_step_is_held_by_the_baseline_check(seed: int) -> None:
    stream = creep_stream(warmup=WARMUP, seed=seed)
    jump = creep_stream(warmup=WARMUP, seed=seed, at_once=True)[: WARMUP + 2]
    # Same natural parameters as the creep's first step, the whole creep applied at once.
    assert jump[-1].key == stream[WARMUP + 1].key
    assert jump[-2].sample.score.tolist() == stream[WARMUP].sample.score.tolist()
    for policy in (stream_policy(None), stream_policy("robust-z-log")):
        result = run_stream(jump, policy)
        finding = result.finding(-1, "score-psi")
        assert finding.outcome == "breach", finding.message
