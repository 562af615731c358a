"""Interactive API documentation at ``/docs``, served from the app itself (no CDN).

Swagger UI 5 (npm ``swagger-ui-dist`` 5.35.0, Apache-2.0, vendored under ``web/static/swagger/``
with its licence and notice) reads the OpenAPI 3.1 document that FastAPI writes; the 4.x build of
the ``swagger-ui-bundle`` PyPI package (1.1.0, the newest) refuses 3.1 ("Unable to render this
definition"). The page starts Swagger UI from ``web/static/apidocs.js`` rather than an inline
script, so ``/docs`` runs under the same Content-Security-Policy as every other page.
"""

from __future__ import annotations

from html import escape

from fastapi import APIRouter, FastAPI, Request
from fastapi.responses import HTMLResponse

SWAGGER_STATIC = "/static/swagger"
SWAGGER_UI_VERSION = "5.35.0"

router = APIRouter(include_in_schema=False)

_PAGE = """<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>tierwise API</title>
<link rel="stylesheet" href="{static}/swagger-ui.css?v={version}">
<link rel="icon" type="image/png" href="{static}/favicon-32x32.png">
</head>
<body>
<div id="swagger-ui" data-openapi-url="{openapi}"></div>
<noscript><p>The interactive API documentation needs JavaScript. The description itself is at
<a href="{openapi}">{openapi}</a>.</p></noscript>
<script src="{static}/swagger-ui-bundle.js?v={version}"></script>
<script src="/static/apidocs.js?v={version}"></script>
</body>
</html>
"""


def docs_page(openapi_url: str) -> str:
    """The ``/docs`` page: Swagger UI's files and the start script, all from the app."""
    return _PAGE.format(static=SWAGGER_STATIC, version=SWAGGER_UI_VERSION,
                        openapi=escape(openapi_url, quote=True))


@router.get("/docs", response_class=HTMLResponse)
def docs(request: Request) -> HTMLResponse:
    """Swagger UI for the OpenAPI description at ``/openapi.json``."""
    return HTMLResponse(docs_page(request.app.openapi_url or "/openapi.json"))


def mount_api_docs(app: FastAPI) -> None:
    """Add the ``/docs`` page (Swagger UI's files are served by ``/static``)."""
    app.include_router(router)
