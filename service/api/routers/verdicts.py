"""One verdict with all its findings."""

from __future__ import annotations

from fastapi import APIRouter

from service import views
from service.api.deps import DbDep
from service.api.routers.snapshots import ERRORS
from service.api.schemas import VerdictPublic
from service.errors import NotFound
from service.store import repo

router = APIRouter(prefix="/v1/verdicts", tags=["verdicts"])


@router.get("/{verdict_id}", response_model=VerdictPublic, responses=ERRORS,
            summary="One verdict with all findings")
def get_verdict(verdict_id: int, db: DbDep) -> dict[str, object]:
    with db.transaction() as session:
        verdict = repo.get_verdict(session, verdict_id=verdict_id)
        if verdict is None:
            raise NotFound(f"no verdict {verdict_id}", field="verdict_id")
        return views.verdict_detail(session, verdict=verdict)
