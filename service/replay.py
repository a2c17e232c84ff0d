"""Replay: judge a model's past snapshots again under another policy, storing nothing.

For each of the model's last ``limit`` verdicts (oldest first) the candidate is judged against
the baseline and reference it was judged against at the time, with the history as it stood
then, under the given policy. The result says, per snapshot, what the gate decided then (and
what was in force after overrides) and what the new policy would decide, and counts how often
each would have held: the way to tune a limit before it pages anyone.

A snapshot whose raw sample was pruned is replayed without it (checks that need the sample are
``skipped``), and the result says so.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy.orm import Session

from service.budget import ReplayBudget
from service.errors import NotFound
from service.gate.evaluate import evaluate, failed_verdict
from service.gate.policy import Policy
from service.gate.types import GateInput
from service.store import repo
from service.text import shown
from service.views import iso


def holding_checks(decision: str, findings: Sequence[Mapping[str, Any]]) -> list[str]:
    """The checks that held a verdict: blocking breaches and blocking inconclusive findings of
    a verdict the gate held (none of a promoted one)."""
    if decision != "hold":
        return []
    names = []
    for f in findings:
        if f.get("blocking", True) and f.get("outcome") in ("breach", "inconclusive"):
            name = str(f.get("check"))
            if name not in names:
                names.append(name)
    return names


@dataclass
class ReplayResult:
    model: str
    policy: str
    policy_digest: str
    rows: list[dict[str, Any]] = field(default_factory=list)

    def summary(self) -> dict[str, Any]:
        total = len(self.rows)
        held_then = sum(1 for r in self.rows if r["decision"] == "hold")
        held_now = sum(1 for r in self.rows if r["replay_decision"] == "hold")
        overridden_to_promote = [
            r for r in self.rows if r["decision"] == "hold" and r["effective_decision"] == "promote"
        ]
        return {
            "snapshots": total,
            "held_then": held_then,
            "held_by_replay": held_now,
            "changed": sum(1 for r in self.rows if r["changed"]),
            "hold_rate_then": round(held_then / total, 4) if total else None,
            "hold_rate_replay": round(held_now / total, 4) if total else None,
            # Holds a person overrode to promote are the gate's known false holds.
            "overridden_holds_still_held": sum(
                1 for r in overridden_to_promote if r["replay_decision"] == "hold"
            ),
            "samples_pruned": sum(1 for r in self.rows if r["sample_pruned"]),
        }

    def to_dict(self) -> dict[str, Any]:
        return {
            "model": self.model,
            "policy": self.policy,
            "policy_digest": self.policy_digest,
            "summary": self.summary(),
            "data": self.rows,
        }


def replay(
    session: Session,
    *,
    model_name: str,
    policy: Policy,
    limit: int,
    history_limit: int = 200,
    budget: ReplayBudget | None = None,
) -> ReplayResult:
    """Replay the last *limit* verdicts of *model_name* under *policy* (see module doc).

    With *budget*, the work is estimated from stored row counts before anything is judged, and
    the wall clock is checked between snapshots (InvalidInput past either limit)."""
    model = repo.get_model(session, name=model_name)
    if model is None:
        raise NotFound(f"no model {shown(model_name)}", field="model")
    pairs, _ = repo.list_verdicts(session, model_id=model.id, limit=limit, details=True)
    pairs.reverse()
    if budget is not None:
        rows_of = _sample_rows(session, ids={v.baseline_id for v, _ in pairs} - {None})
        budget.check_estimate(
            policy,
            [snap.sample_rows + rows_of.get(verdict.baseline_id, 0) for verdict, snap in pairs],
        )
    overrides = repo.overrides_for(session, verdict_ids=[v.id for v, _ in pairs])
    result = ReplayResult(model_name, policy.name, policy.digest)
    depth = max(history_limit, policy.history_depth())
    cache: dict[int, Any] = {}

    def gate_snapshot(snapshot_id: int | None) -> Any:
        if snapshot_id is None:
            return None
        if snapshot_id not in cache:
            row = repo.snapshot_by_id(session, snapshot_id=snapshot_id)
            cache[snapshot_id] = (
                repo.to_gate_snapshot(session, row=row, model_name=model_name) if row else None
            )
        return cache[snapshot_id]

    # One history read for the whole window: the replayed verdicts are the newest len(pairs),
    # so the history before the j-th oldest of them starts right after it, newest first.
    window = repo.history(session, model_id=model.id, limit=depth + len(pairs))
    for j, (verdict, snap) in enumerate(pairs):
        if budget is not None:
            budget.check_time(j, len(pairs))
        candidate = gate_snapshot(snap.id)
        baseline = gate_snapshot(verdict.baseline_id)
        try:
            start = len(pairs) - j
            earlier = window[start : start + depth]
            inp = GateInput(
                candidate=candidate,
                baseline=baseline,
                reference=gate_snapshot(verdict.reference_id),
                now=repo.utc(verdict.created_at),  # type: ignore[arg-type]
                history=earlier,
                baseline_since=None,
                known_keys=repo.known_keys(
                    session, model_id=model.id, among=[snap.parent_key] if snap.parent_key else []
                ),
                newest_watermark=repo.newest_watermark(
                    session, model_id=model.id, before_snapshot_id=snap.id
                ),
            )
            outcome = evaluate(inp, policy)
        except Exception as exc:  # fail closed, as in a live post
            outcome = failed_verdict(exc, policy=policy, baseline_key=baseline and baseline.key)
        effective = repo.effective_decision(verdict, overrides[verdict.id])
        result.rows.append(
            {
                "verdict_id": verdict.id,
                "snapshot": snap.key,
                "created_at": iso(verdict.created_at),
                "baseline": baseline.key if baseline else None,
                "decision": verdict.decision,
                "effective_decision": effective,
                "replay_decision": outcome.decision,
                "replay_reasons": list(outcome.reasons),
                # the checks that would hold it (blocking breaches and inconclusive findings)
                "replay_held_by": holding_checks(
                    outcome.decision, [f.to_dict() for f in outcome.findings]
                ),
                "changed": outcome.decision != verdict.decision,
                "sample_pruned": snap.sample_pruned_at is not None,
            }
        )
    return result


def _sample_rows(session: Session, *, ids: set[int | None]) -> dict[int | None, int]:
    """Sample rows of the snapshots *ids* (stored counts; nothing is decoded)."""
    from sqlalchemy import select

    from service.store.tables import SnapshotRow

    wanted = [i for i in ids if i is not None]
    if not wanted:
        return {}
    rows = session.execute(
        select(SnapshotRow.id, SnapshotRow.sample_rows).where(SnapshotRow.id.in_(wanted))
    ).all()
    return {sid: n or 0 for sid, n in rows}
