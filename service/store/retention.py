"""Retention: prune the raw sample columns of old snapshots; keep everything else forever.

What is pruned: the ``sample_columns`` rows of snapshots created before the cut-off. What is
kept, whatever its age:

* the sample of every model's **baseline** and pinned **reference** (the next candidate is
  compared with them);
* the sample of a **held snapshot not yet resolved**: held, with no override of its verdict and
  no promotion of its model since (on-call may still need to look at it);
* every snapshot row, its score summary (count, moments, quantiles, histogram), every verdict
  with its findings, every override, promotion and audit entry: the evidence of each decision.

Pruned snapshots get ``sample_pruned_at``; the pages and the API then show the summary only.
Keyword-only functions that never commit, like the rest of the store.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import datetime

from sqlalchemy import delete, func, select, update
from sqlalchemy.orm import Session

from service.store.repo import utc
from service.store.tables import (
    ModelRow,
    OverrideRow,
    PromotionRow,
    SampleColumnRow,
    SnapshotRow,
    VerdictRow,
)

CHUNK = 500


@dataclass
class PrunePlan:
    """What a prune does (or, with ``dry_run``, would do)."""

    cutoff: datetime
    prune_ids: list[int] = field(default_factory=list)
    kept_baseline: int = 0
    kept_reference: int = 0
    kept_unresolved_hold: int = 0
    columns: int = 0
    bytes: int = 0

    def to_dict(self) -> dict[str, object]:
        return {
            "cutoff": self.cutoff.isoformat(),
            "snapshots_pruned": len(self.prune_ids),
            "sample_columns": self.columns,
            "sample_bytes": self.bytes,
            "kept_baseline": self.kept_baseline,
            "kept_reference": self.kept_reference,
            "kept_unresolved_hold": self.kept_unresolved_hold,
        }


def _chunks(ids: list[int]) -> Iterable[list[int]]:
    for i in range(0, len(ids), CHUNK):
        yield ids[i : i + CHUNK]


def unresolved_holds(session: Session) -> set[int]:
    """Snapshot ids held by the gate with no override since and no promotion of the model
    after the verdict."""
    held = session.execute(
        select(
            VerdictRow.id, VerdictRow.snapshot_id, VerdictRow.model_id, VerdictRow.created_at
        ).where(VerdictRow.decision == "hold")
    ).all()
    if not held:
        return set()
    overridden = set(session.scalars(select(OverrideRow.verdict_id).distinct()).all())
    promotions: dict[int, list[tuple[datetime | None, int | None]]] = {}
    for model_id, created_at, verdict_id in session.execute(
        select(PromotionRow.model_id, PromotionRow.created_at, PromotionRow.verdict_id)
    ):
        promotions.setdefault(model_id, []).append((utc(created_at), verdict_id))
    out = set()
    for verdict_id, snapshot_id, model_id, created_at in held:
        if verdict_id in overridden:
            continue
        at = utc(created_at)
        later = any(
            (when is not None and at is not None and when > at)
            or (by is not None and by > verdict_id)
            for when, by in promotions.get(model_id, [])
        )
        if not later:
            out.add(snapshot_id)
    return out


def plan_prune(session: Session, *, cutoff: datetime) -> PrunePlan:
    """The snapshots whose raw samples go, and why the others of that age stay."""
    plan = PrunePlan(cutoff=cutoff)
    baselines = {b for (b,) in session.execute(select(ModelRow.baseline_id)) if b is not None}
    references = {r for (r,) in session.execute(select(ModelRow.reference_id)) if r is not None}
    held = unresolved_holds(session)
    old = session.scalars(
        select(SnapshotRow.id)
        .where(
            SnapshotRow.created_at < cutoff,
            SnapshotRow.sample_pruned_at.is_(None),
            SnapshotRow.id.in_(select(SampleColumnRow.snapshot_id)),
        )
        .order_by(SnapshotRow.id)
    ).all()
    for snapshot_id in old:
        if snapshot_id in baselines:
            plan.kept_baseline += 1
        elif snapshot_id in references:
            plan.kept_reference += 1
        elif snapshot_id in held:
            plan.kept_unresolved_hold += 1
        else:
            plan.prune_ids.append(snapshot_id)
    for chunk in _chunks(plan.prune_ids):
        count, size = session.execute(
            select(
                func.count(SampleColumnRow.id), func.sum(func.length(SampleColumnRow.data))
            ).where(SampleColumnRow.snapshot_id.in_(chunk))
        ).one()
        plan.columns += int(count or 0)
        plan.bytes += int(size or 0)
    return plan


def prune(session: Session, *, cutoff: datetime, now: datetime, dry_run: bool = False) -> PrunePlan:
    """Delete the raw samples :func:`plan_prune` selects and mark their snapshots pruned."""
    plan = plan_prune(session, cutoff=cutoff)
    if dry_run:
        return plan
    for chunk in _chunks(plan.prune_ids):
        session.execute(delete(SampleColumnRow).where(SampleColumnRow.snapshot_id.in_(chunk)))
        session.execute(
            update(SnapshotRow).where(SnapshotRow.id.in_(chunk)).values(sample_pruned_at=now)
        )
    session.flush()
    return plan
