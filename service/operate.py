"""Operator actions: override a verdict, set or roll back the baseline, pin the reference.
Each is audited.

Override rules (README, "Overrides"):

* An override is a new row beside the verdict; the verdict itself is never rewritten. The
  decision in force is the latest override's, else the gate's.
* Overriding to the decision already in force is refused (409): nothing would change.
* **hold -> promote**: the candidate becomes the baseline (promotion cause ``override``) when it
  is newer than the snapshot serving now, or when nothing serves. When a newer snapshot already
  serves, the override is recorded and the baseline stays; to serve the older snapshot anyway,
  roll back to it (a separate, explicit act).
* **promote -> hold**: when the candidate serves now, the baseline returns to the most recent
  earlier baseline whose decision in force is still promote (cause ``override``); earlier
  baselines held by an override since are passed over. When the candidate no longer serves (a
  newer snapshot was promoted on top), the baseline stays. When there is no earlier baseline to
  return to (a model's first snapshot), it keeps serving and the answer says to roll back by
  hand.

Every call writes one audit entry: who, what, when, the decision and the baseline before and
after, and the reason. Functions never commit (the request's transaction does).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.errors import Conflict, InvalidInput, NotFound
from service.store import repo
from service.store.tables import ModelRow, OverrideRow, PromotionRow, SnapshotRow, VerdictRow
from service.text import shown

DECISIONS = ("promote", "hold")


@dataclass(frozen=True)
class OverrideOutcome:
    override: OverrideRow
    verdict: VerdictRow
    model: ModelRow
    snapshot: SnapshotRow
    decision_before: str
    baseline_before: str | None
    baseline_after: str | None
    note: str

    @property
    def baseline_moved(self) -> bool:
        return self.baseline_before != self.baseline_after


def verdict_with_model(session: Session, *, verdict_id: int) -> tuple[VerdictRow, ModelRow]:
    """The verdict and its model; NotFound when there is no such verdict."""
    verdict = repo.get_verdict(session, verdict_id=verdict_id)
    if verdict is None:
        raise NotFound(f"no verdict {verdict_id}", field="verdict_id")
    model = session.get(ModelRow, verdict.model_id)
    assert model is not None
    return verdict, model


def clean_reason(reason: str | None) -> str:
    text = (reason or "").strip()
    if not text:
        raise InvalidInput("a reason is required: say why, for the audit log", field="reason")
    if len(text) > 2000:
        raise InvalidInput("the reason is longer than 2000 characters", field="reason")
    if any(
        (ord(c) < 32 and c not in "\t\n\r") or 127 <= ord(c) <= 159 or 0xD800 <= ord(c) <= 0xDFFF
        for c in text
    ):
        # PostgreSQL text cannot hold NUL; other control characters and lone surrogates are
        # never part of a reason
        raise InvalidInput("the reason holds a control character", field="reason")
    return text


def _earlier_baseline(session: Session, *, model_id: int, snapshot_id: int) -> SnapshotRow | None:
    """The most recent earlier baseline other than *snapshot_id* whose decision in force is
    still promote (a snapshot held by an override since is passed over)."""
    seen: set[int] = {snapshot_id}
    for promotion in session.scalars(
        select(PromotionRow)
        .where(PromotionRow.model_id == model_id)
        .order_by(PromotionRow.id.desc())
    ):
        if promotion.snapshot_id in seen:
            continue
        seen.add(promotion.snapshot_id)
        verdict = repo.verdict_for_snapshot(session, snapshot_id=promotion.snapshot_id)
        if verdict is not None:
            overrides = repo.overrides_for(session, verdict_ids=[verdict.id])[verdict.id]
            if repo.effective_decision(verdict, overrides) != "promote":
                continue
        return repo.snapshot_by_id(session, snapshot_id=promotion.snapshot_id)
    return None


def override_verdict(
    session: Session,
    *,
    verdict_id: int,
    decision: str,
    reason: str,
    actor: str,
    now: datetime,
) -> OverrideOutcome:
    """Override verdict *verdict_id* to *decision*; moves the baseline per the module rules."""
    if decision not in DECISIONS:
        raise InvalidInput("decision must be 'promote' or 'hold'", field="decision")
    reason = clean_reason(reason)
    verdict, unlocked = verdict_with_model(session, verdict_id=verdict_id)
    model = repo.get_model(session, name=unlocked.name, lock=True)
    assert model is not None
    snapshot = repo.snapshot_by_id(session, snapshot_id=verdict.snapshot_id)
    assert snapshot is not None
    earlier = repo.overrides_for(session, verdict_ids=[verdict.id])[verdict.id]
    before = repo.effective_decision(verdict, earlier)
    if decision == before:
        raise Conflict(
            f"verdict {verdict.id} ({snapshot.key}) is already {decision}; nothing to override",
            field="decision",
        )
    serving = repo.snapshot_by_id(session, snapshot_id=model.baseline_id)
    baseline_before = serving.key if serving else None
    row = repo.add_override(
        session, verdict_id=verdict.id, decision=decision, reason=reason, actor=actor, now=now
    )
    target, note = _baseline_target(
        session, model=model, snapshot=snapshot, serving=serving, decision=decision
    )
    if target is not None:
        repo.set_baseline(
            session,
            model=model,
            snapshot=target,
            cause="override",
            actor=actor,
            reason=reason,
            verdict_id=verdict.id,
            now=now,
        )
    baseline_after = target.key if target is not None else baseline_before
    repo.add_audit(
        session,
        actor=actor,
        action="verdict.override",
        model=model.name,
        target=f"verdict {verdict.id} ({snapshot.key})",
        before={"decision": before, "baseline": baseline_before},
        after={"decision": decision, "baseline": baseline_after, "override_id": row.id},
        reason=reason,
        now=now,
    )
    return OverrideOutcome(
        row, verdict, model, snapshot, before, baseline_before, baseline_after, note
    )


def _baseline_target(
    session: Session,
    *,
    model: ModelRow,
    snapshot: SnapshotRow,
    serving: SnapshotRow | None,
    decision: str,
) -> tuple[SnapshotRow | None, str]:
    """The snapshot to make the baseline (None: leave it) and a sentence saying what happens."""
    if decision == "promote":
        if serving is None:
            return snapshot, f"{snapshot.key} becomes the baseline (nothing served before)."
        if serving.id == snapshot.id:
            return None, f"{snapshot.key} already serves; the baseline is unchanged."
        if snapshot.id > serving.id:  # ids grow with arrival: newer than what serves
            return snapshot, f"{snapshot.key} becomes the baseline, replacing {serving.key}."
        return None, (
            f"a newer snapshot, {serving.key}, serves already; the baseline is unchanged. To "
            f"serve {snapshot.key} anyway, roll back to it."
        )
    if serving is None or serving.id != snapshot.id:
        what = serving.key if serving else "nothing"
        return None, f"{snapshot.key} does not serve ({what} does); the baseline is unchanged."
    previous = _earlier_baseline(session, model_id=model.id, snapshot_id=snapshot.id)
    if previous is None:
        return None, (
            f"{snapshot.key} keeps serving: no earlier baseline to return to. Roll back by hand "
            "to another snapshot if it must stop serving."
        )
    return previous, (
        f"the baseline goes back to {previous.key}, the latest earlier "
        "baseline still in force as promote."
    )


def _locked_model(session: Session, *, model_name: str) -> ModelRow:
    model = repo.get_model(session, name=model_name, lock=True)
    if model is None:
        raise NotFound(f"no model {shown(model_name)}", field="model")
    return model


def _stored_snapshot(session: Session, *, model: ModelRow, key: str) -> SnapshotRow:
    snapshot = repo.get_snapshot(session, model_id=model.id, key=key)
    if snapshot is None:
        raise NotFound(f"model {model.name!r} has no snapshot {shown(key)}", field="snapshot")
    return snapshot


def rollback(
    session: Session, *, model_name: str, key: str, reason: str, actor: str, now: datetime
) -> tuple[ModelRow, SnapshotRow, SnapshotRow | None, str]:
    """Make stored snapshot *key* the baseline by hand (promote by hand, or roll back);
    audited. Returns the model, the new and the previous baseline, and the promotion's cause:
    ``rollback`` when *key* is older than what served, ``manual`` otherwise."""
    reason = clean_reason(reason)
    model = _locked_model(session, model_name=model_name)
    snapshot = _stored_snapshot(session, model=model, key=key)
    previous = repo.snapshot_by_id(session, snapshot_id=model.baseline_id)
    if previous is not None and previous.id == snapshot.id:
        raise Conflict(f"{key!r} is already the baseline of {model_name!r}", field="snapshot")
    cause = "manual"
    if previous is not None and snapshot.created_at < previous.created_at:
        cause = "rollback"
    repo.set_baseline(
        session,
        model=model,
        snapshot=snapshot,
        cause=cause,
        actor=actor,
        reason=reason,
        verdict_id=None,
        now=now,
    )
    repo.add_audit(
        session,
        actor=actor,
        action=f"baseline.{cause}",
        model=model_name,
        target=key,
        before={"baseline": previous.key if previous else None},
        after={"baseline": key},
        reason=reason,
        now=now,
    )
    return model, snapshot, previous, cause


def pin_reference(
    session: Session,
    *,
    model_name: str,
    key: str | None,
    reason: str,
    actor: str,
    now: datetime,
) -> tuple[SnapshotRow | None, SnapshotRow | None]:
    """Pin snapshot *key* as the model's reference, or unpin (*key* None); audited.

    Returns (new pinned snapshot, previously pinned snapshot).
    """
    reason = clean_reason(reason)
    model = _locked_model(session, model_name=model_name)
    snapshot = _stored_snapshot(session, model=model, key=key) if key is not None else None
    previous = repo.snapshot_by_id(session, snapshot_id=model.reference_id)
    repo.set_reference(session, model=model, snapshot=snapshot)
    repo.add_audit(
        session,
        actor=actor,
        action="reference.pin" if snapshot is not None else "reference.unpin",
        model=model_name,
        target=key,
        before={"reference": previous.key if previous else None},
        after={"reference": key},
        reason=reason,
        now=now,
    )
    return snapshot, previous


def preview_override(session: Session, *, verdict: VerdictRow, decision: str) -> str:
    """What overriding *verdict* to *decision* would do to the baseline, in one sentence
    (nothing is written)."""
    model = session.get(ModelRow, verdict.model_id)
    snapshot = repo.snapshot_by_id(session, snapshot_id=verdict.snapshot_id)
    assert model is not None and snapshot is not None
    serving = repo.snapshot_by_id(session, snapshot_id=model.baseline_id)
    _, note = _baseline_target(
        session, model=model, snapshot=snapshot, serving=serving, decision=decision
    )
    return note
