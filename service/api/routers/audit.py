"""The audit log: every change of what serves and every operator action, newest first."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Query

from service import views
from service.api.deps import CursorDep, DbDep, ReaderDep
from service.api.routers.snapshots import ERRORS
from service.api.schemas import AuditList
from service.errors import Forbidden
from service.store import repo

router = APIRouter(prefix="/v1/audit", tags=["audit"])


RESPONSES: dict[int | str, dict[str, Any]] = {403: dict(ERRORS[404]), 422: dict(ERRORS[422])}


@router.get(
    "",
    response_model=AuditList,
    responses=RESPONSES,
    summary="Audit entries newest first: who, what, when, before and after",
)
def list_audit(
    db: DbDep,
    principal: ReaderDep,
    model: Annotated[str | None, Query(max_length=100, description="Only this model.")] = None,
    limit: Annotated[int, Query(ge=1, le=500)] = 50,
    before_id: CursorDep = None,
) -> dict[str, object]:
    if not principal.allows("read", model):
        raise Forbidden(
            f"{principal.name} may not read the audit log" + (f" of {model!r}" if model else "")
        )
    with db.read() as session:
        rows = list(repo.list_audit(session, model=model, limit=limit + 1, before_id=before_id))
    more = len(rows) > limit
    rows = rows[:limit]
    # entries of models outside the caller's scope are left out of the page; entries about no
    # model (tokens made and revoked) only for callers whose scope is every model
    data = [
        views.audit_view(r)
        for r in rows
        if (principal.allows("read", r.model) if r.model is not None else "*" in principal.models)
    ]
    return {
        "data": data,
        "count": len(data),
        "next_cursor": repo.encode_cursor(rows[-1].id) if more and rows else None,
    }
