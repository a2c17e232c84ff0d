"""Prometheus metrics: this process's counters and histograms (see service/metrics.py), and
per-model gauges read from the database at scrape time (see service/paging.py), so every worker
answers the same model state."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import PlainTextResponse

from service import paging
from service.api.deps import ClockDep, DbDep, PoliciesDep, ReaderDep
from service.api.routers.snapshots import ERRORS

router = APIRouter(tags=["operations"])

CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"


@router.get(
    "/metrics",
    response_class=PlainTextResponse,
    responses={
        200: {"content": {"text/plain": {"schema": {"type": "string"}}}},
        **{k: v for k, v in ERRORS.items() if k in (401, 403)},
    },
    summary="Metrics in the Prometheus text format (series of models outside the token's scope "
    "are left out)",
)
def metrics(
    request: Request, db: DbDep, clock: ClockDep, policies: PoliciesDep, principal: ReaderDep
) -> PlainTextResponse:
    def allow(model: str) -> bool:
        return principal.allows("read", model)

    text = request.app.state.metrics.render(allow=allow)
    with db.read() as session:
        text += paging.model_gauges(session, policies=policies, now=clock(), allow=allow)
    return PlainTextResponse(text, media_type=CONTENT_TYPE)
