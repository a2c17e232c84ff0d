"""A seeded simulated incremental stream, driven through the pure gate.

Generated data for the history tests (not a reference): ``shelf-ranker`` pushes a snapshot every
15 minutes; each snapshot's scores are ``expit(mu_t + sigma_t * z)`` over 3,000 rows, where
``mu_t`` follows a daily cycle (traffic mix) plus a little independent noise from each retrain,
and so does ``log sigma_t``: small natural drift that does not accumulate, every snapshot
healthy. On a false hold the operator overrides, so the next
candidate is compared with the snapshot before it either way, and the history records the
gate's own decision (an overridden hold does not count as healthy history).

Run ``python -m tests.gate.simulated_stream`` to print the figures.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta

import numpy as np
from scipy.special import expit

from service.gate.evaluate import evaluate
from service.gate.policy import Policy, parse_policy
from service.gate.reference import Promotion, choose_reference
from service.gate.types import GateInput, HistoryEntry, Sample, Snapshot, Verdict
from service.stats.drift import psi_null_quantile

ROWS = 3000
BINS = 10
STEP = timedelta(minutes=15)
START = datetime(2026, 12, 1, tzinfo=UTC)
#: Static limit: the 99.9 % point of PSI under no change at this sample size (chi-square
#: approximation, Yurdakul 2018): "hold any shift beyond sampling noise".
STATIC_PSI = round(psi_null_quantile(ROWS, ROWS, BINS, 0.999), 4)
#: The creep's total size, in logit units of the score: a one-step jump of this size has
#: PSI near 0.25, above both the static limit and the 0.1 common-practice band.
CREEP_TOTAL = 0.5
CREEP_STEPS = 48

POLICY_HEAD = f"""
models = ["shelf-ranker"]
[sample]
min_rows = 1000
[history]
stuck_after_holds = 0
[reference]
lag_hours = 24

[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
bins = {BINS}
max = {STATIC_PSI}
"""
#: Adaptive tables by name; "robust-z-log" is the one the README recommends for drift.
ADAPTIVE = {
    "robust-z-log": 'method = "robust-z"\ntransform = "log"\nk = 3.5\n',
    "robust-z": 'method = "robust-z"\nk = 3.5\n',
    "quantile": 'method = "quantile"\nquantile = 0.99\n',
}
ADAPTIVE_COMMON = "window = 50\nmin_history = 20\nmax_limit = 0.1\n"
REFERENCE = f"""
[[checks]]
name = "score-psi-vs-reference"
kind = "drift"
statistic = "psi"
bins = {BINS}
max = 0.1
against = "reference"
"""


def stream_policy(adaptive: str | None, *, include_overridden: bool = False) -> Policy:
    """The stream's policy: static limits only (``None``) or with an adaptive table."""
    table = ""
    if adaptive is not None:
        table = "[checks.adaptive]\n" + ADAPTIVE[adaptive] + ADAPTIVE_COMMON
        table += f"include_overridden = {str(include_overridden).lower()}\n"
    return parse_policy(POLICY_HEAD + table + REFERENCE, name=adaptive or "static")


def natural_parameters(count: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Location and scale paths: a daily cycle of 96 pushes plus independent retrain noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(count)
    mu = -1.0 + 0.12 * np.sin(2 * np.pi * t / 96) + rng.normal(0.0, 0.06, count)
    sigma = np.exp(rng.normal(0.0, 0.03, count))
    return mu, sigma


def snapshot(t: int, mu: float, sigma: float, rng: np.random.Generator) -> Snapshot:
    scores = expit(mu + sigma * rng.standard_normal(ROWS))
    at = START + t * STEP
    return Snapshot(
        model="shelf-ranker",
        key=f"s{t:04d}",
        parent=f"s{t - 1:04d}" if t else None,
        trained_until=at,
        created_at=at,
        rows_trained=1_800_000,
        sample=Sample({"score": scores}),
    )


@dataclass
class StreamResult:
    verdicts: list[Verdict] = field(default_factory=list)

    def holds(self, start: int = 0) -> int:
        return sum(v.decision == "hold" for v in self.verdicts[start:])

    def rate(self, start: int = 0) -> float:
        return self.holds(start) / len(self.verdicts[start:])

    def finding(self, index: int, check: str):  # noqa: ANN201 - test helper
        return next(f for f in self.verdicts[index].findings if f.check == check)


def run_stream(snapshots: list[Snapshot], policy: Policy) -> StreamResult:
    """Judge snapshots[1:] each against the one before; every snapshot ends up serving."""
    result = StreamResult()
    history: list[HistoryEntry] = []
    promotions = [Promotion(snapshots[0].key, snapshots[0].created_at)]  # type: ignore[arg-type]
    by_key = {s.key: s for s in snapshots}
    for t in range(1, len(snapshots)):
        cand, base = snapshots[t], snapshots[t - 1]
        now = cand.created_at
        assert now is not None
        choice = choose_reference(
            pinned=None, lag_hours=policy.reference.lag_hours, promotions=promotions, now=now
        )
        verdict = evaluate(
            GateInput(
                candidate=cand,
                baseline=base,
                now=now,
                reference=by_key.get(choice.snapshot_key or ""),
                history=tuple(reversed(history)),
                baseline_since=promotions[-1].at,
            ),
            policy,
        )
        result.verdicts.append(verdict)
        values = {f.check: f.value for f in verdict.findings if f.value is not None}
        history.append(
            HistoryEntry(
                snapshot_key=cand.key,
                created_at=now,
                decision=verdict.decision,
                effective_decision="promote",  # a false hold is overridden
                healthy=True,
                rows_trained=cand.rows_trained,
                trained_until=cand.trained_until,
                values=values,
            )
        )
        promotions.append(Promotion(cand.key, now))
    return result


def healthy_stream(count: int = 200, seed: int = 20261201) -> list[Snapshot]:
    """*count* healthy candidates plus the first baseline."""
    mu, sigma = natural_parameters(count + 1, seed)
    rng = np.random.default_rng(seed + 1)
    return [snapshot(t, mu[t], sigma[t], rng) for t in range(count + 1)]


def creep_stream(
    warmup: int = 100,
    steps: int = CREEP_STEPS,
    total: float = CREEP_TOTAL,
    seed: int = 7,
    *,
    at_once: bool = False,
) -> list[Snapshot]:
    """*warmup* healthy pushes, then *steps* pushes each moving the scores by total / steps
    (with *at_once*, the whole *total* arrives with the first of them)."""
    count = warmup + steps + 1
    mu, sigma = natural_parameters(count, seed)
    ramp = np.full(steps, total) if at_once else np.arange(1, steps + 1) * total / steps
    creep = np.concatenate([np.zeros(warmup + 1), ramp])
    rng = np.random.default_rng(seed + 1)
    return [snapshot(t, mu[t] + creep[t], sigma[t], rng) for t in range(count)]


def main() -> None:
    stream = healthy_stream()
    print(f"static PSI limit {STATIC_PSI}; 200 healthy candidates")
    for adaptive in (None, "robust-z-log", "robust-z", "quantile"):
        for include in (False, True) if adaptive else (False,):
            res = run_stream(stream, stream_policy(adaptive, include_overridden=include))
            label = (adaptive or "static") + (" +overridden" if include else "")
            print(
                f"{label:26s} false holds {res.holds():3d}/{len(res.verdicts)} = "
                f"{res.rate():6.1%}; after the first 50: {res.rate(50):6.1%}"
            )


if __name__ == "__main__":
    main()
