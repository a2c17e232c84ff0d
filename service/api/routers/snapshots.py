"""POST a snapshot (returns the verdict); GET one snapshot by key."""

from __future__ import annotations

import hashlib
import json
import re
from typing import Any

from fastapi import APIRouter, Path, Request, Response

from service import intake, views
from service.api.deps import ClockDep, DbDep, PoliciesDep, ReaderDep, SettingsDep, TrainerDep
from service.api.sample import to_sample
from service.api.schemas import ErrorResponse, SnapshotCreate, SnapshotPublic, VerdictPublic
from service.errors import InvalidInput, NotFound
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


def content_digest(body: SnapshotCreate) -> str:
    canonical = json.dumps(body.model_dump(), sort_keys=True, default=str, allow_nan=True)
    return "sha256:" + hashlib.sha256(canonical.encode("utf-8")).hexdigest()


@router.post(
    "",
    response_model=VerdictPublic,
    status_code=201,
    responses={
        200: {"model": VerdictPublic, "description": "Retry of a stored snapshot"},
        **ERRORS,
    },
    summary="Post a snapshot; the response is its verdict",
)
def post_snapshot(
    body: SnapshotCreate,
    request: Request,
    response: Response,
    db: DbDep,
    settings: SettingsDep,
    policies: PoliciesDep,
    clock: ClockDep,
    principal: TrainerDep,
    model: str = ModelPath,
) -> dict[str, object]:
    check_model_name(model)
    sample = to_sample(body.sample, settings) if body.sample is not None else None
    post = intake.SnapshotPost(
        key=body.key,
        content_digest=content_digest(body),
        parent=body.parent,
        trained_until=body.trained_until,
        code_version=body.code_version,
        rows_trained=body.rows_trained,
        metrics=dict(body.metrics),
        tags=dict(body.tags),
        sample=sample,
    )
    with db.transaction() as session:
        result = intake.submit(
            session,
            model_name=model,
            post=post,
            policies=policies,
            now=clock(),
            history_limit=settings.history_limit,
            actor=principal.name,
        )
        detail = views.verdict_detail(session, verdict=result.verdict)
    if result.created:
        metrics = getattr(request.app.state, "metrics", None)
        if metrics is not None:
            metrics.verdict(
                model=model,
                decision=str(detail["decision"]),
                seconds=float(str(detail["duration_ms"])) / 1000.0,
            )
    response.status_code = 201 if result.created else 200
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
