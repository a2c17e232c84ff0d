"""One verdict with all its findings."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path

from service import views
from service.api.deps import DbDep, ReaderDep
from service.api.routers.snapshots import ERRORS
from service.api.schemas import MAX_ID, VerdictPublic
from service.errors import NotFound
from service.store import repo
from service.store.tables import ModelRow

router = APIRouter(prefix="/v1/verdicts", tags=["verdicts"])


@router.get(
    "/{verdict_id}",
    response_model=VerdictPublic,
    responses=ERRORS,
    summary="One verdict with all findings",
)
def get_verdict(
    verdict_id: Annotated[int, Path(ge=1, le=MAX_ID)], db: DbDep, principal: ReaderDep
) -> dict[str, object]:
    with db.read() as session:
        verdict = repo.get_verdict(session, verdict_id=verdict_id)
        if verdict is None:
            raise NotFound(f"no verdict {verdict_id}", field="verdict_id")
        model = session.get(ModelRow, verdict.model_id)
        principal.require("read", model.name if model is not None else "")
        return views.verdict_detail(session, verdict=verdict)
