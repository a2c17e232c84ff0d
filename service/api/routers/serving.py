"""What serves now: ``GET /v1/models/{model}/serving`` (see :mod:`service.serving`)."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query, Request, Response

from service.api.deps import DbDep, ReaderDep
from service.api.routers.snapshots import ERRORS, ModelPath
from service.api.schemas import ServingPublic
from service.serving import entity_tag, serving_view

router = APIRouter(prefix="/v1/models", tags=["models"])


@router.get(
    "/{model}/serving",
    response_model=ServingPublic,
    responses={304: {"description": "Not modified (If-None-Match matched the ETag)"}, **ERRORS},
    summary="The snapshot that serves now: since when and what made it serve",
)
def get_serving(
    request: Request,
    response: Response,
    db: DbDep,
    principal: ReaderDep,
    model: str = ModelPath,
    snapshot: Annotated[
        str | None,
        Query(max_length=200, description="Also say where this snapshot stands."),
    ] = None,
) -> object:
    with db.read() as session:
        view = serving_view(session, model_name=model, asked=snapshot)
    tag = entity_tag(view)
    headers = {"ETag": tag, "Cache-Control": "no-cache"}
    wanted = [t.strip() for t in request.headers.get("if-none-match", "").split(",")]
    if tag in wanted or "*" in wanted:
        return Response(status_code=304, headers=headers)
    response.headers.update(headers)
    return view
