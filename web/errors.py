"""One mapping from domain errors to HTTP answers, with the error's own text."""

from __future__ import annotations

from urllib.parse import quote

from fastapi import FastAPI, Request
from fastapi.exceptions import HTTPException
from fastapi.responses import JSONResponse, RedirectResponse, Response
from starlette.exceptions import HTTPException as StarletteHTTPException

from server.services.errors import ServiceError
from web.deps import LoginRequired
from web.templating import render

__all__ = ["install_error_handlers"]


def _wants_html(request: Request) -> bool:
    return "text/html" in request.headers.get("accept", "") or not request.url.path.startswith(
        "/api/"
    )


def _page(request: Request, status: int, message: str) -> Response:
    if not _wants_html(request):
        return JSONResponse({"detail": message}, status_code=status)
    return render(request, "error.html", {"status": status, "message": message},
                  status_code=status)


def install_error_handlers(app: FastAPI) -> None:
    @app.exception_handler(LoginRequired)
    async def _login(request: Request, exc: LoginRequired) -> Response:
        return RedirectResponse(f"/staff/login?next={quote(exc.next_path)}", status_code=303)

    @app.exception_handler(ServiceError)
    async def _service(request: Request, exc: ServiceError) -> Response:
        status = 404 if isinstance(exc, LookupError) else 422
        return _page(request, status, str(exc))

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: HTTPException) -> Response:
        return _page(request, exc.status_code, str(exc.detail))
