"""Overriding a verdict, and the evidence behind it."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Path, Query, Request

from service import operate, paging, views
from service.api.deps import ClockDep, DbDep, OperatorDep, ReaderDep, SettingsDep
from service.api.routers.snapshots import ERRORS
from service.api.schemas import MAX_ID, EvidencePublic, OverrideCreate, OverrideResult

router = APIRouter(prefix="/v1/verdicts", tags=["verdicts"])
RESPONSES: dict[int | str, dict[str, Any]] = {code: dict(v) for code, v in ERRORS.items()}
RESPONSES[403] = dict(ERRORS[404])


@router.post(
    "/{verdict_id}/override",
    response_model=OverrideResult,
    status_code=201,
    responses=RESPONSES,
    summary="Override a verdict's decision (audited; the verdict itself is kept as it was)",
)
def override(
    verdict_id: Annotated[int, Path(ge=1, le=MAX_ID)],
    body: OverrideCreate,
    request: Request,
    db: DbDep,
    settings: SettingsDep,
    clock: ClockDep,
    principal: OperatorDep,
) -> dict[str, object]:
    now = clock()
    with db.transaction() as session:
        _, model = operate.verdict_with_model(session, verdict_id=verdict_id)
        principal.require("operate", model.name)
        outcome = operate.override_verdict(
            session,
            verdict_id=verdict_id,
            decision=body.decision,
            reason=body.reason,
            actor=principal.name,
            now=now,
        )
        queued = paging.on_override(session, settings=settings, outcome=outcome, now=now)
        answer: dict[str, object] = {
            "override": views.override_view(outcome.override),
            "verdict": views.verdict_detail(session, verdict=outcome.verdict),
            "decision_before": outcome.decision_before,
            "baseline_before": outcome.baseline_before,
            "baseline_after": outcome.baseline_after,
            "baseline_moved": outcome.baseline_moved,
            "note": outcome.note,
        }
    paging.wake(request.app.state, queued)
    return answer


@router.get(
    "/{verdict_id}/evidence",
    response_model=EvidencePublic,
    responses=RESPONSES,
    summary="Score distributions on common bins, per-segment table, what changed, what serves",
)
def evidence(
    verdict_id: Annotated[int, Path(ge=1, le=MAX_ID)],
    db: DbDep,
    principal: ReaderDep,
    bins: Annotated[int, Query(ge=2, le=200, description="Bins of the distributions.")] = 30,
) -> dict[str, object]:
    with db.read() as session:
        verdict, model = operate.verdict_with_model(session, verdict_id=verdict_id)
        principal.require("read", model.name)
        return views.verdict_evidence(session, verdict=verdict, bins=bins)
