"""Who is looking at a page. One dependency, so web sign-in can replace it in one place."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends

from service.api.deps import Principal, PrincipalDep


def get_web_principal(principal: PrincipalDep) -> Principal:
    """The caller of a page or a form: for now the same as the API's caller."""
    return principal


WebPrincipalDep = Annotated[Principal, Depends(get_web_principal)]
