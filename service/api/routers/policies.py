"""The loaded policies."""

from __future__ import annotations

from fastapi import APIRouter

from service.api.deps import PoliciesDep
from service.api.schemas import PolicyList

router = APIRouter(prefix="/v1/policies", tags=["policies"])


@router.get("", response_model=PolicyList, summary="The policies in force, with their digests")
def list_policies(policies: PoliciesDep) -> dict[str, object]:
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
        for p in policies
    ]
    return {"data": data, "count": len(data)}
