"""API tokens, for administrators: list, make, revoke. (``tidegate token`` does the same on the
database directly, which is how the first admin token is made.)"""

from __future__ import annotations

from typing import Annotated, Literal

from fastapi import APIRouter, Path
from pydantic import BaseModel, ConfigDict, Field, StringConstraints

from service.api.deps import AdminDep, ClockDep, DbDep
from service.api.routers.snapshots import ERRORS
from service.api.schemas import MAX_ID
from service.errors import InvalidInput, NotFound
from service.store import tokens
from service.store.tables import TokenRow
from service.views import token_view

router = APIRouter(prefix="/v1/tokens", tags=["tokens"])

Pattern = Annotated[
    str, StringConstraints(min_length=1, max_length=100, pattern=r"^[A-Za-z0-9*?._\-\[\]!]+$")
]


class TokenCreate(BaseModel):
    """A new token: its role and the model patterns it may act on."""

    model_config = ConfigDict(extra="forbid")

    role: Literal["viewer", "trainer", "operator", "admin"] = Field(description="What it may do.")
    models: list[Pattern] = Field(
        default_factory=lambda: ["*"],
        min_length=1,
        max_length=50,
        description="Shell-style model patterns in scope (default: every model).",
    )
    label: Annotated[str, StringConstraints(max_length=200, pattern=r"^[^\x00-\x1f\x7f]*$")] = (
        Field("", description="A name for the audit log (default: role-id).")
    )


class TokenPublic(BaseModel):
    id: int
    prefix: str
    label: str
    role: str
    models: list[str]
    created_at: str | None = None
    revoked_at: str | None = None
    last_used_at: str | None = None


class TokenCreated(TokenPublic):
    token: str = Field(description="The token itself: shown this once, never stored.")


class TokenList(BaseModel):
    data: list[TokenPublic]
    count: int


@router.get("", response_model=TokenList, responses=ERRORS, summary="The live API tokens")
def list_tokens(db: DbDep, principal: AdminDep) -> dict[str, object]:
    with db.read() as session:
        data = [token_view(row) for row in tokens.list_tokens(session)]
    return {"data": data, "count": len(data)}


@router.post(
    "",
    response_model=TokenCreated,
    status_code=201,
    responses=ERRORS,
    summary="Make a token (its text is in this answer only)",
)
def create_token(
    body: TokenCreate, db: DbDep, clock: ClockDep, principal: AdminDep
) -> dict[str, object]:
    now = clock()
    try:
        with db.transaction() as session:
            made = tokens.create_token(
                session,
                role=body.role,
                models=body.models,
                label=body.label,
                actor=principal.name,
                now=now,
            )
            row = session.get(TokenRow, made.id)
            assert row is not None
            view = token_view(row)
    except ValueError as exc:
        raise InvalidInput(str(exc), field="models") from None
    return {**view, "token": made.secret}


@router.delete(
    "/{token_id}", response_model=TokenPublic, responses=ERRORS, summary="Revoke a token"
)
def revoke_token(
    db: DbDep,
    clock: ClockDep,
    principal: AdminDep,
    token_id: Annotated[int, Path(ge=1, le=MAX_ID)],
) -> dict[str, object]:
    now = clock()
    with db.transaction() as session:
        row = session.get(TokenRow, token_id)
        if row is None:
            raise NotFound(f"no token {token_id}", field="token_id")
        tokens.revoke_token(session, token=row, actor=principal.name, now=now)
        return token_view(row)
