"""Read models: what the API, the CLI and the pages show, built from stored rows.

Plain dictionaries of JSON-safe values; the API validates them into its response schemas, the
pages render them. One place decides what a verdict or a model looks like to a person.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy.orm import Session

from service.gate.history import stuck_state
from service.gate.policy import HistoryRules, Policy, select_policy
from service.store import repo
from service.store.tables import (
    AuditRow,
    ModelRow,
    OverrideRow,
    PromotionRow,
    SnapshotRow,
    TokenRow,
    VerdictRow,
)


def iso(value: datetime | None) -> str | None:
    value = repo.utc(value)
    return value.isoformat().replace("+00:00", "Z") if value else None


def override_view(row: OverrideRow) -> dict[str, Any]:
    return {
        "id": row.id,
        "decision": row.decision,
        "reason": row.reason,
        "actor": row.actor,
        "created_at": iso(row.created_at),
    }


def verdict_summary(
    verdict: VerdictRow, snapshot: SnapshotRow, overrides: list[OverrideRow], model: str
) -> dict[str, Any]:
    return {
        "verdict_id": verdict.id,
        "model": model,
        "snapshot": snapshot.key,
        "decision": verdict.decision,
        "effective_decision": repo.effective_decision(verdict, overrides),
        "overridden": bool(overrides),
        "reasons": list(verdict.reasons),
        "moved_baseline": verdict.moved_baseline,
        "created_at": iso(verdict.created_at),
        "trained_until": iso(snapshot.trained_until),
    }


def verdict_detail(session: Session, *, verdict: VerdictRow) -> dict[str, Any]:
    snapshot = repo.snapshot_by_id(session, snapshot_id=verdict.snapshot_id)
    model = session.get(ModelRow, verdict.model_id)
    assert snapshot is not None and model is not None
    baseline = repo.snapshot_by_id(session, snapshot_id=verdict.baseline_id)
    reference = repo.snapshot_by_id(session, snapshot_id=verdict.reference_id)
    overrides = repo.overrides_for(session, verdict_ids=[verdict.id])[verdict.id]
    prev_id, next_id = repo.neighbour_verdicts(session, verdict=verdict)
    out = verdict_summary(verdict, snapshot, overrides, model.name)
    out.update(
        {
            "baseline": baseline.key if baseline else None,
            "reference": reference.key if reference else None,
            "policy": verdict.policy_name,
            "policy_digest": verdict.policy_digest,
            "error": verdict.error,
            "duration_ms": round(verdict.duration_ms, 3),
            "findings": list(verdict.findings),
            "overrides": [override_view(o) for o in overrides],
            "previous_verdict_id": prev_id,
            "next_verdict_id": next_id,
            "serves_now": model.baseline_id == snapshot.id,
        }
    )
    return out


def snapshot_view(session: Session, *, model: ModelRow, snapshot: SnapshotRow) -> dict[str, Any]:
    verdict = repo.verdict_for_snapshot(session, snapshot_id=snapshot.id)
    columns: list[str] = []
    if snapshot.sample_pruned_at is None and snapshot.sample_rows:
        columns = repo.sample_column_names(session, snapshot_id=snapshot.id)
    return {
        "model": model.name,
        "key": snapshot.key,
        "parent": snapshot.parent_key,
        "trained_until": iso(snapshot.trained_until),
        "code_version": snapshot.code_version,
        "rows_trained": snapshot.rows_trained,
        "metrics": dict(snapshot.metrics or {}),
        "tags": dict(snapshot.tags or {}),
        "sample_rows": snapshot.sample_rows,
        "columns": columns,
        "summary": snapshot.summary,
        "sample_pruned_at": iso(snapshot.sample_pruned_at),
        "content_digest": snapshot.content_digest,
        "created_at": iso(snapshot.created_at),
        "verdict_id": verdict.id if verdict else None,
        "is_baseline": model.baseline_id == snapshot.id,
    }


def _holds_in_a_row(
    rows: Sequence[tuple[VerdictRow, SnapshotRow]], overrides: dict[int, list[OverrideRow]]
) -> int:
    """How many of the latest verdicts (*rows*, newest first) in a row are holds; an override
    to promote ends a run."""
    count = 0
    for verdict, _ in rows:
        if repo.effective_decision(verdict, overrides[verdict.id]) != "hold":
            break
        count += 1
    return count


def model_view(
    session: Session, *, model: ModelRow, now: datetime, policies: Sequence[Policy] = ()
) -> dict[str, Any]:
    baseline = repo.snapshot_by_id(session, snapshot_id=model.baseline_id)
    reference = repo.snapshot_by_id(session, snapshot_id=model.reference_id)
    since = repo.utc(model.baseline_since)
    age = (now - since).total_seconds() if since else None
    policy = select_policy(policies, model.name)
    # A model no policy matches uses the default threshold.
    threshold = (policy.history if policy is not None else HistoryRules()).stuck_after_holds
    # One read of the latest verdicts serves both the last verdict and the run of holds.
    rows, next_id = repo.list_verdicts(session, model_id=model.id, limit=max(50, threshold + 1))
    overrides = repo.overrides_for(session, verdict_ids=[v.id for v, _ in rows])
    last_view = None
    if rows:
        last, last_snapshot = rows[0]
        last_view = verdict_summary(last, last_snapshot, overrides[last.id], model.name)
    holds = _holds_in_a_row(rows, overrides)
    before_id = next_id
    while holds and holds == len(rows) and before_id is not None:
        # the run goes on past what was read: count on, page by page (no cap: the list, the
        # API, the CLI and the stuck finding say the same number)
        rows, before_id = repo.list_verdicts(
            session, model_id=model.id, limit=500, before_id=before_id
        )
        overrides = repo.overrides_for(session, verdict_ids=[v.id for v, _ in rows])
        more = _holds_in_a_row(rows, overrides)
        holds += more
        if more < len(rows):
            break
    watermark = repo.utc(baseline.trained_until) if baseline is not None else None
    data_age = (now - watermark).total_seconds() if watermark else None
    latest = repo.promotions(session, model_id=model.id, limit=1)
    return {
        "name": model.name,
        "baseline": baseline.key if baseline else None,
        "baseline_since": iso(since),
        "baseline_age_seconds": round(age, 1) if age is not None else None,
        # serving age (since it became the baseline) and data age (since its training data
        # ends) differ after a roll-back to an old snapshot: both are shown, by name
        "baseline_trained_until": iso(watermark),
        "baseline_data_age_seconds": round(data_age, 1) if data_age is not None else None,
        "baseline_cause": latest[0].cause if latest else None,
        "reference": reference.key if reference else None,
        "reference_lag_hours": policy.reference.lag_hours if policy is not None else None,
        "last_verdict": last_view,
        "holds_24h": repo.count_verdicts(
            session, model_id=model.id, decision="hold", since=now - timedelta(hours=24)
        ),
        "consecutive_holds": holds,
        "stuck": stuck_state(holds, threshold=threshold, baseline_since=since, now=now).to_dict(),
        "created_at": iso(model.created_at),
    }


# --- on-call read models: evidence, promotions, audit ---------------------------------------


def snapshot_brief(row: SnapshotRow | None) -> dict[str, Any] | None:
    """What a person compares between candidate and baseline: lineage, volume, metrics."""
    if row is None:
        return None
    summary = row.summary or {}
    return {
        "key": row.key,
        "trained_until": iso(row.trained_until),
        "code_version": row.code_version,
        "rows_trained": row.rows_trained,
        "sample_rows": row.sample_rows,
        "sample_pruned": row.sample_pruned_at is not None,
        "metrics": dict(row.metrics or {}),
        "score_mean": summary.get("mean"),
        "score_std": summary.get("std"),
        "nonfinite": (summary["count"] - summary["finite"]) if summary else None,
        "created_at": iso(row.created_at),
    }


def promotion_view(row: PromotionRow, keys: dict[int, str]) -> dict[str, Any]:
    return {
        "id": row.id,
        "snapshot": keys.get(row.snapshot_id),
        "previous": keys.get(row.previous_id) if row.previous_id is not None else None,
        "cause": row.cause,
        "verdict_id": row.verdict_id,
        "actor": row.actor,
        "reason": row.reason,
        "created_at": iso(row.created_at),
    }


def promotions_view(session: Session, *, model: ModelRow, limit: int = 50) -> list[dict[str, Any]]:
    """The model's baseline history, newest first."""
    rows = repo.promotions(session, model_id=model.id, limit=limit)
    ids = {r.snapshot_id for r in rows} | {r.previous_id for r in rows if r.previous_id}
    keys = {s.id: s.key for s in (repo.snapshot_by_id(session, snapshot_id=i) for i in ids) if s}
    return [promotion_view(r, keys) for r in rows]


def audit_view(row: AuditRow) -> dict[str, Any]:
    return {
        "id": row.id,
        "at": iso(row.at),
        "actor": row.actor,
        "action": row.action,
        "model": row.model,
        "target": row.target,
        "before": row.before,
        "after": row.after,
        "reason": row.reason,
    }


#: Outcomes whose evidence the verdict page leads with.
FAILED_OUTCOMES = ("breach", "inconclusive", "advisory")


def compared_with(findings: Sequence[dict[str, Any]]) -> list[str]:
    """What the failed findings compared the candidate with (``baseline``, ``reference``), in
    that order; the baseline alone when no failed finding compared with anything."""
    sides = {
        str(f.get("against"))
        for f in findings
        if f.get("outcome") in FAILED_OUTCOMES and f.get("against") in ("baseline", "reference")
    }
    return [s for s in ("baseline", "reference") if s in sides] or ["baseline"]


def verdict_evidence(session: Session, *, verdict: VerdictRow, bins: int = 30) -> dict[str, Any]:
    """The evidence behind a verdict for a person: the candidate's score distribution beside
    what each failed check compared it with (the baseline, the reference, or both), the
    per-segment table, what changed, list evidence for list checks, and what serves now."""
    from service import evidence, list_evidence

    snapshot = repo.snapshot_by_id(session, snapshot_id=verdict.snapshot_id)
    model = session.get(ModelRow, verdict.model_id)
    assert snapshot is not None and model is not None
    baseline = repo.snapshot_by_id(session, snapshot_id=verdict.baseline_id)
    reference = repo.snapshot_by_id(session, snapshot_id=verdict.reference_id)
    samples: dict[int, Any] = {}

    def sample_of(row: SnapshotRow | None) -> Any:
        if row is None or row.sample_pruned_at is not None:
            return None
        if row.id not in samples:
            samples[row.id] = repo.load_sample(session, snapshot_id=row.id)
        return samples[row.id]

    cand_sample = sample_of(snapshot)
    base_sample = sample_of(baseline)
    cand_side = None
    if cand_sample is not None:
        cand_side = evidence.SideInput(f"candidate {snapshot.key}", values=cand_sample.score)
    elif snapshot.summary:
        cand_side = evidence.SideInput(f"candidate {snapshot.key}", summary=snapshot.summary)

    def other_side(role: str, row: SnapshotRow | None) -> Any:
        other = sample_of(row)
        if row is not None and other is not None:
            return evidence.SideInput(f"{role} {row.key}", values=other.score)
        paired = cand_sample.column("baseline_score") if cand_sample is not None else None
        if role == "baseline" and paired is not None:
            return evidence.SideInput(
                "baseline (scores on the same rows)", values=paired, source="paired"
            )
        if row is not None and row.summary:
            return evidence.SideInput(f"{role} {row.key}", summary=row.summary)
        return None

    findings = list(verdict.findings)
    sides = compared_with(findings)
    comparisons = []
    for role in sides:
        row = baseline if role == "baseline" else reference
        dist = evidence.distribution(cand_side, other_side(role, row), bins=bins)
        comparisons.append(
            {
                "against": role,
                "key": row.key if row else None,
                "checks": [
                    f["check"]
                    for f in findings
                    if f.get("against") == role and f.get("outcome") in FAILED_OUTCOMES
                ],
                "distribution": dist.to_dict(),
                "snapshot": snapshot_brief(row),
            }
        )
    main = evidence.distribution(cand_side, other_side("baseline", baseline), bins=bins)
    serving = repo.snapshot_by_id(session, snapshot_id=model.baseline_id)
    promoted = [
        p
        for p in promotions_view(session, model=model, limit=200)
        if p["snapshot"] == snapshot.key or p["previous"] == snapshot.key
    ]
    lists = None
    list_checks = [f for f in findings if f.get("kind") == "lists"]
    if list_checks and cand_sample is not None:
        role = str(list_checks[0].get("against") or "baseline")
        other_row = baseline if role == "baseline" else reference
        lists = list_evidence.list_evidence(
            cand_sample,
            sample_of(other_row),
            against=role,
            other_key=other_row.key if other_row else None,
            k=list_evidence.k_of(list_checks),
            catalog_size=list_evidence.catalog_of(snapshot.metrics or {}),
        )
    return {
        "verdict_id": verdict.id,
        "model": model.name,
        "snapshot": snapshot.key,
        "baseline": baseline.key if baseline else None,
        "reference": reference.key if reference else None,
        "compared_with": sides,
        "distribution": main.to_dict(),
        "comparisons": comparisons,
        "segments": evidence.segment_table(cand_sample, base_sample) if cand_sample else [],
        "finding_segments": evidence.finding_segment_rows(verdict.findings),
        "candidate": snapshot_brief(snapshot),
        "baseline_snapshot": snapshot_brief(baseline),
        "reference_snapshot": snapshot_brief(reference),
        "lists": lists,
        "serving": serving.key if serving else None,
        "serving_since": iso(model.baseline_since),
        "candidate_serving": serving is not None and serving.id == snapshot.id,
        "promotions": promoted,
    }


def token_view(row: TokenRow) -> dict[str, object]:
    """What listings show of a token (never its digest)."""
    return {
        "id": row.id,
        "prefix": row.prefix,
        "label": row.label,
        "role": row.role,
        "models": list(row.models or []),
        "created_at": iso(row.created_at),
        "revoked_at": iso(row.revoked_at),
        "last_used_at": iso(row.last_used_at),
    }
