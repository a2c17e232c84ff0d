"""Who is looking at a page, and what each page needs (see :mod:`service.web.auth`)."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends

from service.api.deps import Principal
from service.web.auth import WebAllowed, get_web_principal

__all__ = ["WebOperatorDep", "WebPrincipalDep", "WebReaderDep", "get_web_principal"]

#: The caller of a page (signed in, or by token, or open mode), with no action declared.
WebPrincipalDep = Annotated[Principal, Depends(get_web_principal)]
#: The caller, allowed to read / to operate (role, and the path's model when it has one).
WebReaderDep = Annotated[Principal, Depends(WebAllowed("read"))]
WebOperatorDep = Annotated[Principal, Depends(WebAllowed("operate"))]
