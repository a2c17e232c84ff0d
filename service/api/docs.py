"""The API documentation page, ``/docs``, served whole by the service: it works with no network.

The Swagger UI files come from the ``swagger-ui-bundle-v2`` package (Swagger UI 5, which reads
OpenAPI 3.1; import name ``swagger_ui_bundle``; a runtime dependency: the version is the
package's, nothing is copied by hand) and are served under ``/docs/assets/`` from a fixed list.
The page starts the UI with a script file of its own (``docs.js``), since the
Content-Security-Policy allows no inline script.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import swagger_ui_bundle
from fastapi import APIRouter, Depends
from fastapi import Path as PathParam
from fastapi.responses import HTMLResponse, Response

from service.api.deps import PUBLIC

router = APIRouter(include_in_schema=False, dependencies=[Depends(PUBLIC)])

BUNDLE = Path(swagger_ui_bundle.swagger_ui_path)
OWN = Path(__file__).resolve().parent.parent / "web" / "static"
#: name -> (folder, media type): nothing else on disk is reachable.
ASSETS = {
    "swagger-ui.css": (BUNDLE, "text/css; charset=utf-8"),
    "swagger-ui-bundle.js": (BUNDLE, "text/javascript; charset=utf-8"),
    "favicon-32x32.png": (BUNDLE, "image/png"),
    "docs.js": (OWN, "text/javascript; charset=utf-8"),
}

PAGE = """<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<title>tidegate API</title>
<link rel="stylesheet" href="/docs/assets/swagger-ui.css">
<link rel="icon" type="image/png" href="/docs/assets/favicon-32x32.png">
</head>
<body>
<div id="api-docs"></div>
<script src="/docs/assets/swagger-ui-bundle.js"></script>
<script src="/docs/assets/docs.js"></script>
</body>
</html>
"""


@router.get("/docs", response_class=HTMLResponse)
def docs_page() -> HTMLResponse:
    """The interactive documentation of the API (the schema is ``/openapi.json``)."""
    return HTMLResponse(PAGE)


@router.get("/docs/assets/{name}")
def docs_asset(name: Annotated[str, PathParam(max_length=40)]) -> Response:
    found = ASSETS.get(name)
    if found is None:
        return Response("not found", status_code=404, media_type="text/plain")
    folder, media = found
    return Response(
        (folder / name).read_bytes(),
        media_type=media,
        headers={"Cache-Control": "public, max-age=3600"},
    )
