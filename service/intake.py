"""The flow of one post (DESIGN §3): store the snapshot and its sample, load the baseline,
reference and history, judge (pure), store the verdict and move the baseline, in one transaction.

Fail closed: if loading the comparison data or evaluating raises, the verdict is ``hold`` with
the error as its reason and the snapshot is still stored.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timedelta

import numpy as np
from sqlalchemy.orm import Session

from service.errors import Conflict, InvalidInput
from service.gate.evaluate import evaluate, failed_verdict
from service.gate.policy import Policy, select_policy
from service.gate.types import GateInput, Sample, Snapshot
from service.store import repo
from service.store.tables import ModelRow, SnapshotRow, VerdictRow
from service.text import shown

log = logging.getLogger("tidegate.intake")


@dataclass(frozen=True)
class SnapshotPost:
    """A validated post. ``content_digest`` tells an identical retry from a conflicting one."""

    key: str
    content_digest: str
    parent: str | None = None
    trained_until: datetime | None = None
    code_version: str | None = None
    rows_trained: int | None = None
    metrics: dict[str, float] = field(default_factory=dict)
    tags: dict[str, str] = field(default_factory=dict)
    sample: Sample | None = None
    #: Text columns' (codes, distinct values), computed while validating; the store reuses them.
    text_codes: Mapping[str, tuple[np.ndarray, list[str]]] = field(default_factory=dict)
    #: The digest as version 0.1 computed it (JSON posts only; computed only when a stored
    #: snapshot's digest differs), so a retry across the upgrade is still a retry.
    legacy_digest: Callable[[], str] | None = None

    def same_content(self, stored_digest: str) -> bool:
        if stored_digest == self.content_digest:
            return True
        return self.legacy_digest is not None and stored_digest == self.legacy_digest()


@dataclass(frozen=True)
class Submitted:
    model: ModelRow
    snapshot: SnapshotRow
    verdict: VerdictRow
    created: bool


def resolve_reference(
    session: Session,
    *,
    model: ModelRow,
    policy: Policy | None,
    now: datetime,
    watermark: datetime | None = None,
) -> SnapshotRow | None:
    """The model's reference snapshot (rules in service/gate/reference.py): the one an
    operator pinned; else, when the policy sets ``[reference] lag_hours``, the newest baseline
    trained at least that many hours before the candidate's *watermark* (by the clock only when
    the candidate has no watermark); else none."""
    pinned = repo.snapshot_by_id(session, snapshot_id=model.reference_id)
    if pinned is not None:
        return pinned
    lag = policy.reference.lag_hours if policy is not None else None
    if lag is None:
        return None
    if watermark is not None:
        # The SQL form of service.gate.reference.baseline_as_of_watermark.
        return repo.promoted_as_of_watermark(
            session, model_id=model.id, until=watermark - timedelta(hours=lag)
        )
    # The SQL form of service.gate.reference.baseline_as_of.
    row = repo.promotion_as_of(session, model_id=model.id, at=now - timedelta(hours=lag))
    return session.get(SnapshotRow, row.snapshot_id) if row is not None else None


def require_sample(post: SnapshotPost, policy: Policy | None) -> None:
    """Refuse a post without a sample unless *policy* judges reported metrics only
    (``[sample] required = false``), and a sample with no rows always (README, "The post")."""
    if post.sample is None:
        if policy is None or policy.sample.required:
            raise InvalidInput(
                "a sample is required (with at least the score column); a policy that judges "
                "reported metrics only says so with [sample] required = false"
                + ("" if policy is not None else "; no policy matches this model"),
                field="sample",
            )
    elif len(post.sample) == 0:
        raise InvalidInput("the sample has no rows", field="sample.score")


def submit(
    session: Session,
    *,
    model_name: str,
    post: SnapshotPost,
    policies: Sequence[Policy],
    now: datetime,
    history_limit: int = 200,
    actor: str = "trainer",
) -> Submitted:
    """Store *post* for *model_name*, judge it and store the verdict. Does not commit.

    Raises
    ------
    InvalidInput
        The post has no sample and the model's policy does not judge reported metrics only,
        or its sample has no rows (nothing is stored).
    Conflict
        The key was used for other content.
    """
    policy = select_policy(policies, model_name)
    require_sample(post, policy)
    model = repo.get_or_create_model(session, name=model_name, now=now)
    existing = repo.get_snapshot(session, model_id=model.id, key=post.key)
    if existing is not None:
        if post.same_content(existing.content_digest):
            verdict_row = repo.verdict_for_snapshot(session, snapshot_id=existing.id)
            if verdict_row is not None:
                return Submitted(model, existing, verdict_row, created=False)
        raise Conflict(
            f"snapshot {shown(post.key)} of model {shown(model_name)} exists with other content; "
            "use a new key for a new snapshot",
            field="key",
        )
    # Read before the candidate is stored: the newest watermark of the earlier snapshots.
    newest_watermark = repo.newest_watermark(session, model_id=model.id)
    snapshot_row = repo.add_snapshot(
        session,
        model_id=model.id,
        key=post.key,
        parent=post.parent,
        trained_until=post.trained_until,
        code_version=post.code_version,
        rows_trained=post.rows_trained,
        metrics=post.metrics,
        tags=post.tags,
        content_digest=post.content_digest,
        sample=post.sample,
        now=now,
        text_codes=post.text_codes,
    )
    baseline_row = repo.snapshot_by_id(session, snapshot_id=model.baseline_id)
    reference_row: SnapshotRow | None = None
    started = time.perf_counter()
    try:
        reference_row = resolve_reference(
            session, model=model, policy=policy, now=now, watermark=post.trained_until
        )
        candidate = Snapshot(
            model=model_name,
            key=post.key,
            parent=post.parent,
            trained_until=post.trained_until,
            code_version=post.code_version,
            rows_trained=post.rows_trained,
            metrics=post.metrics,
            tags=post.tags,
            sample=post.sample,
            created_at=now,
        )
        baseline = (
            repo.to_gate_snapshot(session, row=baseline_row, model_name=model_name)
            if baseline_row is not None
            else None
        )
        reference = (
            repo.to_gate_snapshot(session, row=reference_row, model_name=model_name)
            if reference_row is not None
            else None
        )
        inp = GateInput(
            candidate=candidate,
            baseline=baseline,
            reference=reference,
            now=now,
            history=repo.history(
                session,
                model_id=model.id,
                limit=max(history_limit, policy.history_depth() if policy else 0),
            ),
            baseline_since=repo.utc(model.baseline_since),
            known_keys=repo.known_keys(
                session, model_id=model.id, among=[post.parent] if post.parent else []
            ),
            newest_watermark=newest_watermark,
        )
        verdict = evaluate(inp, policy)
    except Exception as exc:  # fail closed
        log.exception("evaluation of %s/%s failed", model_name, post.key)
        verdict = failed_verdict(
            exc, policy=policy, baseline_key=baseline_row.key if baseline_row else None
        )
    duration_ms = (time.perf_counter() - started) * 1000.0
    if policy is not None:
        repo.record_policy(session, policy=policy, now=now)
    verdict_row = repo.add_verdict(
        session,
        model_id=model.id,
        snapshot_id=snapshot_row.id,
        baseline_id=baseline_row.id if baseline_row else None,
        reference_id=reference_row.id if reference_row else None,
        verdict=verdict,
        duration_ms=duration_ms,
        now=now,
    )
    if verdict.decision == "promote" and verdict.moves_baseline:
        repo.set_baseline(
            session,
            model=model,
            snapshot=snapshot_row,
            cause="verdict",
            actor="gate",
            reason="promoted by verdict",
            verdict_id=verdict_row.id,
            now=now,
        )
        verdict_row.moved_baseline = True
        session.flush()
        repo.add_audit(
            session,
            actor="gate",
            action="baseline.verdict",
            model=model_name,
            target=post.key,
            before={"baseline": baseline_row.key if baseline_row else None},
            after={"baseline": post.key, "verdict_id": verdict_row.id, "posted_by": actor},
            reason="promoted by verdict",
            now=now,
        )
    return Submitted(model, snapshot_row, verdict_row, created=True)
