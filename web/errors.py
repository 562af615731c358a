"""One mapping from domain errors to HTTP answers, with the error's own text.

HTML routes answer with an error page; under ``/staff/`` it is drawn inside the staff layout
with a link back to the staff page of the area the request came from (``/staff/users/x/role``
goes back to ``/staff/users``), elsewhere inside the public layout with a link to ``/``. The
JSON API (``/api/...``, including the feed push endpoint) answers JSON. Bad query or form
parameters of an HTML route (``?start=garbage``) get a 422 page naming the parameter and what it
expects; API routes keep FastAPI's JSON list of validation errors.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any
from urllib.parse import quote

from fastapi import FastAPI, Request
from fastapi.exception_handlers import request_validation_exception_handler
from fastapi.exceptions import HTTPException, RequestValidationError
from fastapi.responses import JSONResponse, RedirectResponse, Response
from starlette.exceptions import HTTPException as StarletteHTTPException

from server.services.errors import ServiceError
from server.services.feeds import FeedConfigError
from web.deps import LoginRequired
from web.templating import render

__all__ = ["back_link", "install_error_handlers", "validation_message"]

# Staff areas with a page of their own: the first path segment after /staff/.
_STAFF_AREAS = ("review", "policies", "users", "feeds", "district")

# What a parameter of each pydantic error type is expected to look like (the message of pydantic
# says what went wrong; this says what to write instead).
_EXPECTED = {
    "date_from_datetime_parsing": "a date as YYYY-MM-DD, e.g. 2026-11-30",
    "date_parsing": "a date as YYYY-MM-DD, e.g. 2026-11-30",
    "date_type": "a date as YYYY-MM-DD, e.g. 2026-11-30",
    "date_from_datetime_inexact": "a date as YYYY-MM-DD, e.g. 2026-11-30",
    "datetime_parsing": "a date and time in ISO 8601, e.g. 2026-11-30T08:00",
    "datetime_from_date_parsing": "a date and time in ISO 8601, e.g. 2026-11-30T08:00",
    "int_parsing": "a whole number",
    "int_type": "a whole number",
    "float_parsing": "a number",
    "bool_parsing": "true or false",
    "missing": "a value",
}


def _is_api(request: Request) -> bool:
    return request.url.path.startswith("/api/")


def _wants_html(request: Request) -> bool:
    return "text/html" in request.headers.get("accept", "") or not _is_api(request)


def back_link(path: str) -> tuple[str, str]:
    """Where an error page under ``path`` links back to, and the link's text.

    Staff pages go back to the staff page of their area (a district's sub-pages to the
    district), everything else to the public start page.
    """
    parts = [p for p in path.split("/") if p]
    if not parts or parts[0] != "staff":
        return "/", "Back to the start page"
    if len(parts) >= 2 and parts[1] in _STAFF_AREAS:
        if parts[1] == "district" and len(parts) >= 3:
            return f"/staff/district/{quote(parts[2])}", "Back to the district"
        if parts[1] != "district":
            return f"/staff/{parts[1]}", f"Back to {parts[1].capitalize()}"
    return "/staff/", "Back to the staff overview"


def _page(request: Request, status: int, message: str) -> Response:
    if not _wants_html(request):
        return JSONResponse({"detail": message}, status_code=status)
    href, label = back_link(request.url.path)
    staff = request.url.path.startswith("/staff")
    return render(request, "error.html", {"status": status, "message": message,
                                          "staff": staff, "back_href": href,
                                          "back_label": label}, status_code=status)


def _loc(loc: Sequence[Any]) -> str:
    where = {"query": "query parameter", "path": "path part", "body": "form field",
             "header": "header", "cookie": "cookie"}.get(str(loc[0]) if loc else "", "parameter")
    name = ".".join(str(p) for p in loc[1:]) or "?"
    return f"{where} {name!r}"


def validation_message(errors: Sequence[dict[str, Any]]) -> str:
    """One line per bad parameter: where, what was given, what is expected."""
    lines = []
    for err in errors:
        kind = str(err.get("type", ""))
        expected = _EXPECTED.get(kind)
        text = f"{_loc(err.get('loc', ()))}: {err.get('msg', 'invalid value')}"
        given = err.get("input")
        if kind != "missing" and isinstance(given, str | int | float):
            text += f" (given {str(given)[:80]!r})"
        if expected:
            text += f"; expected {expected}"
        lines.append(text + ".")
    return "\n".join(lines) or "invalid request"


def install_error_handlers(app: FastAPI) -> None:
    @app.exception_handler(LoginRequired)
    async def _login(request: Request, exc: LoginRequired) -> Response:
        return RedirectResponse(f"/staff/login?next={quote(exc.next_path)}", status_code=303)

    @app.exception_handler(ServiceError)
    async def _service(request: Request, exc: ServiceError) -> Response:
        status = 404 if isinstance(exc, LookupError) else 422
        return _page(request, status, str(exc))

    @app.exception_handler(FeedConfigError)
    async def _feeds_file(request: Request, exc: FeedConfigError) -> Response:
        # the feed file was edited into an invalid state while the server runs: say where
        return _page(request, 503, f"The feed definition file is invalid: {exc}")

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: HTTPException) -> Response:
        return _page(request, exc.status_code, str(exc.detail))

    @app.exception_handler(RequestValidationError)
    async def _invalid(request: Request, exc: RequestValidationError) -> Response:
        if _is_api(request):
            return await request_validation_exception_handler(request, exc)
        return _page(request, 422, validation_message(exc.errors()))
