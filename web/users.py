"""Users (admins only): add, change role, disable or enable, set a new password.

Changing a role, disabling or enabling and setting a password end that user's sessions.
"""

from __future__ import annotations

from typing import Annotated

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
from web.deps import AdminDep, CsrfDep, SessionDep
from web.templating import render

router = APIRouter(tags=["staff"])


@router.get("/users", response_class=HTMLResponse)
def users(request: Request, session: SessionDep, user: AdminDep) -> Response:
    """Every staff account and its role."""
    return render(request, "staff/users.html",
                  {"accounts": list_accounts(session=session), "roles": ROLES})


@router.post("/users")
def add(
    session: SessionDep, user: AdminDep, _csrf: CsrfDep, name: Annotated[str, Form()],
    role: Annotated[str, Form()], password: Annotated[str, Form()],
) -> RedirectResponse:
    add_account(session=session, name=name, role=role, password=password, actor=user.name)
    return RedirectResponse("/staff/users", status_code=303)


@router.post("/users/{name}/role")
def role(
    session: SessionDep, user: AdminDep, _csrf: CsrfDep, name: str, role: Annotated[str, Form()]
) -> RedirectResponse:
    change_role(session=session, name=name, role=role, actor=user.name)
    return RedirectResponse("/staff/users", status_code=303)


@router.post("/users/{name}/active")
def active(
    session: SessionDep, user: AdminDep, _csrf: CsrfDep, name: str,
    active: Annotated[str, Form()],
) -> RedirectResponse:
    set_active(session=session, name=name, active=active == "yes", actor=user.name)
    return RedirectResponse("/staff/users", status_code=303)


@router.post("/users/{name}/password")
def password(
    session: SessionDep, user: AdminDep, _csrf: CsrfDep, name: str,
    password: Annotated[str, Form()],
) -> RedirectResponse:
    """Set a new password (an admin resetting a forgotten one); the user signs in again."""
    set_password(session=session, name=name, password=password, actor=user.name)
    return RedirectResponse("/staff/users", status_code=303)
