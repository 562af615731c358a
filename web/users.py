"""Users (admins only): add, change role, disable or enable, set a new password.

Changing a role, disabling or enabling and setting a password end that user's sessions. After
each change the page says what was done (``?done=<what>&name=<who>``; the text comes from
:data:`NOTICES`, only the name from the address, escaped). The admin's own row offers neither a
role change nor Disable, which the service refuses (an admin cannot lock themselves out).
"""

from __future__ import annotations

from typing import Annotated
from urllib.parse import urlencode

from fastapi import APIRouter, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from server.services.auth import (
    ROLES,
    add_account,
    change_role,
    list_accounts,
    set_active,
    set_password,
)
from web.deps import CsrfDep, ManageUsersDep, SessionDep
from web.templating import render

router = APIRouter(tags=["staff"])

NOTICES = {
    "added": "Added {name}.",
    "role": "Changed the role of {name} to {role}; their sessions have ended.",
    "disabled": "Disabled {name}; their sessions have ended.",
    "enabled": "Enabled {name}; they can sign in again.",
    "password": "Set a new password for {name}; their sessions have ended.",
}


def _done(what: str, name: str, **extra: str) -> RedirectResponse:
    return RedirectResponse("/staff/users?" + urlencode({"done": what, "name": name, **extra}),
                            status_code=303)


@router.get("/users", response_class=HTMLResponse)
def users(
    request: Request, session: SessionDep, user: ManageUsersDep, done: str = "", name: str = "",
    role: str = "",
) -> Response:
    """Every staff account and its role; after a change, a notice saying what was done."""
    accounts = list_accounts(session=session)
    notice = ""
    if done in NOTICES and any(a.name == name for a in accounts):
        notice = NOTICES[done].format(name=name, role=role if role in ROLES else "?")
    return render(request, "staff/users.html",
                  {"accounts": accounts, "roles": ROLES, "notice": notice})


@router.post("/users")
def add(
    session: SessionDep, user: ManageUsersDep, _csrf: CsrfDep, name: Annotated[str, Form()],
    role: Annotated[str, Form()], password: Annotated[str, Form()],
) -> RedirectResponse:
    account = add_account(session=session, name=name, role=role, password=password,
                          actor=user.name)
    return _done("added", account.name)


@router.post("/users/{name}/role")
def role(
    session: SessionDep, user: ManageUsersDep, _csrf: CsrfDep, name: str,
    role: Annotated[str, Form()],
) -> RedirectResponse:
    change_role(session=session, name=name, role=role, actor=user.name)
    return _done("role", name, role=role)


@router.post("/users/{name}/active")
def active(
    session: SessionDep, user: ManageUsersDep, _csrf: CsrfDep, name: str,
    active: Annotated[str, Form()],
) -> RedirectResponse:
    set_active(session=session, name=name, active=active == "yes", actor=user.name)
    return _done("enabled" if active == "yes" else "disabled", name)


@router.post("/users/{name}/password")
def password(
    session: SessionDep, user: ManageUsersDep, _csrf: CsrfDep, name: str,
    password: Annotated[str, Form()],
) -> RedirectResponse:
    """Set a new password (an admin resetting a forgotten one); the user signs in again."""
    set_password(session=session, name=name, password=password, actor=user.name)
    return _done("password", name)
