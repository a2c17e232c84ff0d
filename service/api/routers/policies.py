"""The loaded policies."""

from __future__ import annotations

from fastapi import APIRouter

from service.api.deps import DbDep, PoliciesDep, Principal, ReaderDep
from service.api.routers.snapshots import ERRORS
from service.api.schemas import PolicyList
from service.gate.policy import Policy, select_policy
from service.store import repo

router = APIRouter(prefix="/v1/policies", tags=["policies"])


def visible_policies(policies: list[Policy], principal: Principal, db: DbDep) -> list[Policy]:
    """A token scoped to some models sees the policies in force for the models it may read,
    and those whose patterns its scope covers; an unscoped one (``*``) sees them all."""
    if "*" in principal.models:
        return policies
    with db.read() as session:
        names = [m.name for m in repo.list_model_rows(session) if principal.allows("read", m.name)]
    in_force = {id(p) for p in (select_policy(policies, name) for name in names) if p is not None}
    return [
        p
        for p in policies
        if id(p) in in_force or any(principal.allows("read", pattern) for pattern in p.models)
    ]


@router.get(
    "",
    response_model=PolicyList,
    responses=ERRORS,
    summary="The policies in force, with their digests",
)
def list_policies(policies: PoliciesDep, principal: ReaderDep, db: DbDep) -> dict[str, object]:
    data = [
        {
            "name": p.name,
            "path": p.path,
            "digest": p.digest,
            "models": list(p.models),
            "description": p.description,
            "first_snapshot": p.first_snapshot,
            "on_inconclusive": p.on_inconclusive,
            "checks": [
                {"name": c.name, "kind": c.kind, "blocking": c.blocking, "against": c.against}
                for c in p.checks
            ],
            "text": p.text,
        }
        for p in visible_policies(policies, principal, db)
    ]
    return {"data": data, "count": len(data)}
