"""Prometheus metrics of this process (see service/metrics.py)."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import PlainTextResponse

from service.api.deps import ReaderDep
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
def metrics(request: Request, principal: ReaderDep) -> PlainTextResponse:
    text = request.app.state.metrics.render(allow=lambda model: principal.allows("read", model))
    return PlainTextResponse(text, media_type=CONTENT_TYPE)
