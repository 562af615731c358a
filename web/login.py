"""Staff login and logout.

The login form is protected by a double-submit token (a random cookie echoed in a hidden field),
since there is no session yet; after login every form carries the session-bound CSRF token.
Failed logins are rate limited per user name (any case) and client address together and, far more
loosely, per client address, so a stranger who knows a name cannot lock its owner out and staff
sharing one office or proxy address do not lock each other out (:mod:`server.services.auth` says
why). Each attempt is stored before its password is checked, so the limit holds however many
arrive at once; a refused attempt says when to try again (429).
"""

from __future__ import annotations

import secrets
from typing import Annotated

from fastapi import APIRouter, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from server.services.auth import (
    LoginRefusedError,
    TooManyAttemptsError,
    authenticate,
    end_session,
)
from web.deps import SESSION_COOKIE, CsrfDep, SessionDep, StaffDep, signer
from web.templating import render

router = APIRouter(tags=["staff"])
LOGIN_COOKIE = "tw_login"


def _safe_next(target: str) -> str:
    return target if target.startswith("/staff") and not target.startswith("//") else "/staff/"


def _form(request: Request, next_path: str, error: str = "", status: int = 200) -> Response:
    token = secrets.token_urlsafe(16)
    response = render(request, "staff/login.html",
                      {"next": _safe_next(next_path), "error": error, "login_token": token},
                      status_code=status)
    response.set_cookie(LOGIN_COOKIE, token, httponly=True, samesite="strict",
                        secure=request.url.scheme == "https", path="/staff/login")
    return response


@router.get("/login", response_class=HTMLResponse)
def login_form(request: Request, next: str = "/staff/") -> Response:
    """The login form."""
    return _form(request, next)


@router.post("/login", response_class=HTMLResponse)
def login(
    request: Request, session: SessionDep, name: Annotated[str, Form()],
    password: Annotated[str, Form()], login_token: Annotated[str, Form()] = "",
    next: Annotated[str, Form()] = "/staff/",
) -> Response:
    """Check the name and password; on success set the signed session cookie."""
    cookie = request.cookies.get(LOGIN_COOKIE, "")
    if not cookie or not secrets.compare_digest(cookie, login_token):
        return _form(request, next, "The form expired; please try again.", 403)
    client = request.client.host if request.client else "?"
    try:
        user = authenticate(session=session, name=name, password=password,
                            limiter=request.app.state.login_limiter, client=client)
    except TooManyAttemptsError as exc:
        return _form(request, next, str(exc), 429)
    except LoginRefusedError as exc:
        return _form(request, next, str(exc), 401)
    response = RedirectResponse(_safe_next(next), status_code=303)
    response.set_cookie(SESSION_COOKIE, signer(request).issue(user), httponly=True,
                        samesite="lax", secure=request.url.scheme == "https",
                        max_age=signer(request).max_age, path="/")
    response.delete_cookie(LOGIN_COOKIE, path="/staff/login")
    return response


@router.post("/logout")
def logout(
    request: Request, session: SessionDep, user: StaffDep, _csrf: CsrfDep
) -> RedirectResponse:
    """End the session: this cookie, and every other session of the account, stop working."""
    end_session(session=session, user=user,
                client=request.client.host if request.client else "?")
    response = RedirectResponse("/staff/login", status_code=303)
    response.delete_cookie(SESSION_COOKIE, path="/")
    return response
