"""Models: the list with baselines and last verdicts; one model; setting the baseline."""

from __future__ import annotations

from contextlib import nullcontext
from datetime import datetime
from typing import Annotated, Literal

from fastapi import APIRouter, Query, Request

from service import operate, paging, views
from service.api.deps import (
    ClockDep,
    CursorDep,
    DbDep,
    OperatorDep,
    PoliciesDep,
    ReaderDep,
    ReplayerDep,
    SettingsDep,
)
from service.api.routers.snapshots import ERRORS, ModelPath
from service.api.schemas import (
    BaselinePublic,
    BaselineSet,
    DeliveryList,
    ErrorResponse,
    ModelList,
    ModelPublic,
    ReferencePublic,
    ReferenceSet,
    ReplayPublic,
    ReplayRequest,
    VerdictList,
)
from service.budget import ReplayBudget, in_background, over_resample_cap
from service.errors import InvalidInput, NotFound
from service.gate.policy import PolicyError, parse_policy, select_policy
from service.replay import replay
from service.store import deliveries, repo
from service.text import shown

router = APIRouter(prefix="/v1/models", tags=["models"])


@router.get(
    "",
    response_model=ModelList,
    responses=ERRORS,
    summary="Every model with its baseline and last verdict",
)
def list_models(
    db: DbDep, clock: ClockDep, policies: PoliciesDep, principal: ReaderDep
) -> dict[str, object]:
    now = clock()
    with db.read() as session:
        data = [
            views.model_view(session, model=m, now=now, policies=policies)
            for m in repo.list_model_rows(session)
            if principal.allows("read", m.name)
        ]
    return {"data": data, "count": len(data)}


@router.get("/{model}", response_model=ModelPublic, responses=ERRORS, summary="One model")
def get_model(
    db: DbDep,
    clock: ClockDep,
    policies: PoliciesDep,
    principal: ReaderDep,
    model: str = ModelPath,
) -> dict[str, object]:
    with db.read() as session:
        row = repo.get_model(session, name=model)
        if row is None:
            raise NotFound(f"no model {shown(model)}", field="model")
        return views.model_view(session, model=row, now=clock(), policies=policies)


@router.get(
    "/{model}/verdicts",
    response_model=VerdictList,
    responses=ERRORS,
    summary="A model's verdicts, newest first, with filters and cursor pagination",
)
def list_verdicts(
    db: DbDep,
    principal: ReaderDep,
    model: str = ModelPath,
    decision: Annotated[Literal["promote", "hold"] | None, Query()] = None,
    since: Annotated[datetime | None, Query(description="Created at or after (ISO 8601).")] = None,
    until: Annotated[datetime | None, Query(description="Created before (ISO 8601).")] = None,
    limit: Annotated[int, Query(ge=1, le=500)] = 50,
    before_id: CursorDep = None,
) -> dict[str, object]:
    for name, value in (("since", since), ("until", until)):
        if value is not None and value.tzinfo is None:
            raise InvalidInput(
                "give a time zone (e.g. 2026-12-01T02:45:00Z)", field=f"query.{name}"
            )
    with db.read() as session:
        row = repo.get_model(session, name=model)
        if row is None:
            raise NotFound(f"no model {shown(model)}", field="model")
        rows, next_id = repo.list_verdicts(
            session,
            model_id=row.id,
            decision=decision,
            since=since,
            until=until,
            limit=limit,
            before_id=before_id,
        )
        overrides = repo.overrides_for(session, verdict_ids=[v.id for v, _ in rows])
        data = [views.verdict_summary(v, s, overrides[v.id], model) for v, s in rows]
    return {
        "data": data,
        "count": len(data),
        "next_cursor": repo.encode_cursor(next_id) if next_id is not None else None,
    }


@router.put(
    "/{model}/baseline",
    response_model=BaselinePublic,
    responses=ERRORS,
    summary="Set the baseline by hand: promote a snapshot or roll back to an earlier one",
)
def set_baseline(
    body: BaselineSet,
    db: DbDep,
    clock: ClockDep,
    principal: OperatorDep,
    model: str = ModelPath,
) -> dict[str, object]:
    with db.transaction() as session:
        _, snapshot, previous, cause = operate.rollback(
            session,
            model_name=model,
            key=body.snapshot,
            reason=body.reason,
            actor=principal.name,
            now=clock(),
        )
    return {
        "model": model,
        "baseline": snapshot.key,
        "previous": previous.key if previous else None,
        "cause": cause,
    }


@router.post(
    "/{model}/replay",
    response_model=ReplayPublic,
    responses={
        **ERRORS,
        429: {"model": ErrorResponse, "description": "A replay is running already; retry"},
    },
    summary="Judge the model's past snapshots again under a policy; stores nothing",
)
def replay_model(
    body: ReplayRequest,
    db: DbDep,
    policies: PoliciesDep,
    settings: SettingsDep,
    request: Request,
    principal: ReplayerDep,
    model: str = ModelPath,
) -> dict[str, object]:
    """Needs the ``replay`` action (operator, admin): a replay can cost a lot, shaped by the
    policy sent (see service/budget.py for its limits)."""
    if body.policy is None:
        policy = select_policy(policies, model)
        if policy is None:
            raise InvalidInput(f"no policy matches model {shown(model)}; send one", field="policy")
    else:
        try:
            policy = parse_policy(body.policy, name="replay", path="(request)")
        except PolicyError as exc:
            raise InvalidInput(str(exc), field="policy", code="invalid_policy") from None
    too_many = over_resample_cap(policy, settings.max_resamples)
    if too_many is not None:
        raise InvalidInput(too_many, field="policy", code="invalid_policy")
    budget = ReplayBudget(
        max_work=settings.replay_max_work, max_seconds=settings.replay_max_seconds
    )
    # replay stores nothing: a read-only unit of work, which on SQLite takes no write lock (a
    # long replay must not hold up the trainers' posts)
    # one replay per process at most (429 past it); and, where the app bounds heavy work with a
    # limiter of its own (app.state.heavy, shared with posts), a slot of it for the judging
    heavy = getattr(request.app.state, "heavy", None)
    with (
        request.app.state.replay_slots.hold(),
        heavy.slot() if heavy is not None else nullcontext(),
        db.read() as session,
    ):
        result = in_background(
            lambda: replay(
                session,
                model_name=model,
                policy=policy,
                limit=body.limit,
                history_limit=settings.history_limit,
                budget=budget,
            )
        )
    return result.to_dict()


@router.put(
    "/{model}/reference",
    response_model=ReferencePublic,
    responses=ERRORS,
    summary="Pin a snapshot as the model's reference (the anchor against slow creep), or unpin",
)
def set_reference(
    body: ReferenceSet,
    db: DbDep,
    clock: ClockDep,
    principal: OperatorDep,
    model: str = ModelPath,
) -> dict[str, object]:
    with db.transaction() as session:
        pinned, previous = operate.pin_reference(
            session,
            model_name=model,
            key=body.snapshot,
            reason=body.reason,
            actor=principal.name,
            now=clock(),
        )
    return {
        "model": model,
        "reference": pinned.key if pinned else None,
        "previous": previous.key if previous else None,
    }


@router.get(
    "/{model}/deliveries",
    response_model=DeliveryList,
    responses=ERRORS,
    summary="The model's latest webhook messages (hold, stuck, override) and their delivery",
)
def list_deliveries(
    db: DbDep,
    principal: ReaderDep,
    model: str = ModelPath,
    limit: Annotated[int, Query(ge=1, le=200)] = 50,
) -> dict[str, object]:
    with db.read() as session:
        row = repo.get_model(session, name=model)
        if row is None:
            raise NotFound(f"no model {model!r}", field="model")
        data = [
            paging.delivery_view(d)
            for d in deliveries.for_model(session, model_id=row.id, limit=limit)
        ]
    return {"data": data, "count": len(data)}
