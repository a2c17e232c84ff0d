"""Liveness and readiness."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request
from fastapi.responses import JSONResponse

from service.api.deps import PUBLIC
from service.api.schemas import Health
from service.store import db as store_db

router = APIRouter(tags=["health"], dependencies=[Depends(PUBLIC)])


@router.get("/healthz", response_model=Health, summary="The process is up")
async def healthz() -> dict[str, object]:
    # on the event loop itself, not in the thread pool: it answers while every worker thread
    # is busy with heavy posts or replays
    return {"status": "ok", "detail": {}}


@router.get(
    "/readyz",
    response_model=Health,
    responses={503: {"model": Health}},
    summary="The database answers and is at the current revision",
)
def readyz(request: Request) -> object:
    engine = request.app.state.engine
    head = request.app.state.head_revision
    try:
        current = store_db.current_revision(engine)
    except Exception as exc:  # the database does not answer
        return JSONResponse(
            status_code=503,
            content={"status": "not_ready", "detail": {"database": f"{type(exc).__name__}: {exc}"}},
        )
    if current != head:
        return JSONResponse(
            status_code=503,
            content={"status": "not_ready", "detail": {"revision": current, "needs": head}},
        )
    return {
        "status": "ok",
        "detail": {"revision": current, "policies": len(request.app.state.policies)},
    }
