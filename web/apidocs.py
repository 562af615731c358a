"""Interactive API documentation at ``/docs``, served from the app itself (no CDN).

Swagger UI comes from the ``swagger-ui-bundle`` package and is mounted under ``/static/swagger``, so
the documentation works offline like every other page.
"""

from __future__ import annotations

from fastapi import APIRouter, FastAPI, Request
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.responses import HTMLResponse
from fastapi.staticfiles import StaticFiles
from swagger_ui_bundle import swagger_ui_path

SWAGGER_STATIC = "/static/swagger"

router = APIRouter(include_in_schema=False)


@router.get("/docs", response_class=HTMLResponse)
def docs(request: Request) -> HTMLResponse:
    """Swagger UI for the OpenAPI description at ``/openapi.json``."""
    return get_swagger_ui_html(
        openapi_url=request.app.openapi_url,
        title="tierwise API",
        swagger_js_url=f"{SWAGGER_STATIC}/swagger-ui-bundle.js",
        swagger_css_url=f"{SWAGGER_STATIC}/swagger-ui.css",
        swagger_favicon_url=f"{SWAGGER_STATIC}/favicon-32x32.png",
    )


def mount_api_docs(app: FastAPI) -> None:
    """Serve Swagger UI's files and the ``/docs`` page (call before the ``/static`` mount)."""
    app.mount(SWAGGER_STATIC, StaticFiles(directory=swagger_ui_path), name="swagger")
    app.include_router(router)
