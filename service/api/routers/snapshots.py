"""POST a snapshot (returns the verdict); GET one snapshot by key."""

from __future__ import annotations

import re
from typing import Any

import anyio.to_thread
from fastapi import APIRouter, FastAPI, Path, Request, Response

from service import intake, paging, views
from service.api import body, columnar, upload
from service.api.deps import ClockDep, DbDep, PoliciesDep, ReaderDep, SettingsDep, TrainerDep
from service.api.schemas import (
    ErrorResponse,
    SnapshotCreate,
    SnapshotMeta,
    SnapshotPublic,
    VerdictPublic,
)
from service.errors import InvalidInput, NotFound
from service.heavy import Heavy
from service.store import repo
from service.text import shown

router = APIRouter(prefix="/v1/models/{model}/snapshots", tags=["snapshots"])

MODEL_NAME = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,99}$"
ModelPath = Path(description="Model name: letters, digits, . _ - (at most 100).", max_length=100)
ERRORS: dict[int | str, dict[str, Any]] = {
    401: {"model": ErrorResponse, "description": "No valid API token"},
    403: {
        "model": ErrorResponse,
        "description": "The token's role or model scope does not allow this",
    },
    404: {"model": ErrorResponse},
    409: {"model": ErrorResponse},
    413: {"model": ErrorResponse},
    415: {"model": ErrorResponse},
    422: {"model": ErrorResponse},
    503: {
        "model": ErrorResponse,
        "description": "The database did not complete the request (nothing was stored; retry)",
    },
}


def check_model_name(model: str) -> str:
    if not re.match(MODEL_NAME, model):
        raise InvalidInput(
            "model names are letters, digits, '.', '_' and '-', starting with a letter or digit",
            field="model",
        )
    return model


UPLOAD_FORM = {
    "type": "object",
    "required": ["snapshot", "sample"],
    "properties": {
        "snapshot": {
            "allOf": [{"$ref": "#/components/schemas/SnapshotMeta"}],
            "description": "The snapshot's fields without the sample, as JSON.",
        },
        "sample": {
            "type": "string",
            "format": "binary",
            "description": "The sample's columns, named as in JSON (score, label, "
            "baseline_score, segment.<name>, ...): an Arrow IPC stream "
            f"({columnar.ARROW_STREAM}) or a Parquet file ({columnar.PARQUET}).",
        },
    },
}
REQUEST_BODY: dict[str, Any] = {
    "required": True,
    "description": "The snapshot as JSON, or as multipart/form-data with the sample as Arrow "
    "or Parquet. Either may be compressed as a whole (header Content-Encoding: gzip or zstd); "
    "the size limit holds for the decoded body.",
    "content": {
        "application/json": {"schema": {"$ref": "#/components/schemas/SnapshotCreate"}},
        "multipart/form-data": {
            "schema": UPLOAD_FORM,
            "encoding": {
                "snapshot": {"contentType": "application/json"},
                "sample": {"contentType": f"{columnar.ARROW_STREAM}, {columnar.PARQUET}"},
            },
        },
    },
}
#: Models only the multipart form refers to; added to the OpenAPI components (see app.py).
OPENAPI_MODELS = (SnapshotCreate, SnapshotMeta)


@router.post(
    "",
    response_model=VerdictPublic,
    status_code=201,
    responses={
        200: {"model": VerdictPublic, "description": "Retry of a stored snapshot"},
        **ERRORS,
    },
    summary="Post a snapshot; the response is its verdict",
    openapi_extra={"requestBody": REQUEST_BODY},
)
async def post_snapshot(
    request: Request,
    response: Response,
    db: DbDep,
    settings: SettingsDep,
    policies: PoliciesDep,
    clock: ClockDep,
    principal: TrainerDep,
    model: str = ModelPath,
) -> dict[str, object]:
    """Read the body here (the event loop only moves bytes); decode, validate and judge in
    worker threads, a bounded number at a time (service/heavy.py)."""
    check_model_name(model)
    encoding = body.content_encoding(request.headers.get("content-encoding"))
    content_type = request.headers.get("content-type")
    upload.check_media_type(content_type)
    heavy: Heavy = request.app.state.heavy
    data = await body.receive(request)
    post = await heavy.run(
        upload.parse_post, data, content_type=content_type, encoding=encoding, settings=settings
    )
    del data
    now = clock()

    def store_and_judge() -> tuple[bool, dict[str, Any]]:
        with heavy.slot(), db.transaction() as session:
            result = intake.submit(
                session,
                model_name=model,
                post=post,
                policies=policies,
                now=now,
                history_limit=settings.history_limit,
                actor=principal.name,
            )
            queued = paging.on_verdict(
                session,
                settings=settings,
                policies=policies,
                model=result.model,
                snapshot=result.snapshot,
                verdict=result.verdict,
                created=result.created,
                now=now,
            )
            detail = views.verdict_detail(session, verdict=result.verdict)
        paging.wake(request.app.state, queued)
        return result.created, detail

    created, detail = await anyio.to_thread.run_sync(store_and_judge)
    if created:
        metrics = getattr(request.app.state, "metrics", None)
        if metrics is not None:
            metrics.verdict(
                model=model,
                decision=str(detail["decision"]),
                seconds=float(str(detail["duration_ms"])) / 1000.0,
            )
    response.status_code = 201 if created else 200
    return detail


@router.get(
    "/{key}", response_model=SnapshotPublic, responses=ERRORS, summary="One snapshot by its key"
)
def get_snapshot(
    db: DbDep, principal: ReaderDep, key: str, model: str = ModelPath
) -> dict[str, object]:
    with db.read() as session:
        model_row = repo.get_model(session, name=model)
        if model_row is None:
            raise NotFound(f"no model {shown(model)}", field="model")
        snapshot = repo.get_snapshot(session, model_id=model_row.id, key=key)
        if snapshot is None:
            raise NotFound(f"model {shown(model)} has no snapshot {shown(key)}", field="key")
        return views.snapshot_view(session, model=model_row, snapshot=snapshot)


def document_upload(app: FastAPI) -> None:
    """Add the models the post's request body refers to (JSON and the multipart form) to the
    app's OpenAPI components: the route reads its body itself, so FastAPI does not see them."""
    generate = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema:
            return app.openapi_schema
        schema = generate()
        components = schema.setdefault("components", {}).setdefault("schemas", {})
        for model_class in OPENAPI_MODELS:
            found = model_class.model_json_schema(ref_template="#/components/schemas/{model}")
            for name, definition in found.pop("$defs", {}).items():
                components.setdefault(name, definition)
            components.setdefault(model_class.__name__, found)
        app.openapi_schema = schema
        return schema

    app.openapi = openapi  # type: ignore[method-assign]
