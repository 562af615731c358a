"""Request dependencies: the session, settings, templates, the signed-in user and CSRF checks.

``StaffDep`` admits any signed-in staff member; ``allowed("decide")`` and the named dependencies
below admit those whose role may do that action (``server.services.users.PERMISSIONS``, the one
table of who may do what; templates ask ``user.may(action)``). A request without a valid session
is sent to the login page (:class:`LoginRequired`); a signed-in user without the role gets 403.
Every POST of a staff form goes through :func:`csrf_protected`.

Integer parameters of routes use the bounded types below (:data:`RowId`, :data:`BigRowId`,
:data:`PageNumber`): a value the database column cannot hold is a 422 like any other bad
parameter, never an overflow inside the driver (SQLite and psycopg raise on integers past their
column's range).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Annotated

from fastapi import Depends, HTTPException, Request
from fastapi.templating import Jinja2Templates
from pydantic import Field
from sqlalchemy.orm import Session

from server.config import Settings
from server.services.auth import SessionSigner, StaffUser, session_user
from server.services.database import Database
from server.services.notify import NotifyConfig
from server.services.users import PERMISSIONS

SESSION_COOKIE = "tw_session"

INT32_MAX = 2**31 - 1  # PostgreSQL ``integer`` (the ruleset, user and region keys)
INT64_MAX = 2**63 - 1  # ``bigint`` (assessment, vintage, decision keys) and SQLite's INTEGER

# The key of a row in a table with ``integer`` keys (a ruleset version): 1 .. 2**31 - 1.
RowId = Annotated[int, Field(ge=1, le=INT32_MAX)]
# The key of a row in a table with ``bigint`` keys (an assessment): 1 .. 2**63 - 1.
BigRowId = Annotated[int, Field(ge=1, le=INT64_MAX)]
# A page of a paged list: 1 .. 2**31 - 1 (the offset it gives stays within 64 bits).
PageNumber = Annotated[int, Field(ge=1, le=INT32_MAX)]


class LoginRequired(Exception):  # noqa: N818 - a control-flow signal, handled by the app
    """Raised by staff dependencies when nobody is signed in; the app redirects to login."""

    def __init__(self, next_path: str) -> None:
        self.next_path = next_path
        super().__init__(next_path)


def get_session(request: Request) -> Iterator[Session]:
    with request.app.state.database.transaction() as session:
        yield session


def get_database(request: Request) -> Database:
    """The app's database, for routes that open a transaction only when they need one."""
    return request.app.state.database  # type: ignore[no-any-return]


def get_settings(request: Request) -> Settings:
    return request.app.state.settings  # type: ignore[no-any-return]


def get_templates(request: Request) -> Jinja2Templates:
    return request.app.state.templates  # type: ignore[no-any-return]


def get_notify(request: Request) -> NotifyConfig | None:
    """Recipients of tier-change notices (``TIERWISE_NOTIFY_FILE``), loaded once at start-up."""
    return request.app.state.notify  # type: ignore[no-any-return]


SessionDep = Annotated[Session, Depends(get_session)]
DatabaseDep = Annotated[Database, Depends(get_database)]
SettingsDep = Annotated[Settings, Depends(get_settings)]
TemplatesDep = Annotated[Jinja2Templates, Depends(get_templates)]
NotifyDep = Annotated[NotifyConfig | None, Depends(get_notify)]


def signer(request: Request) -> SessionSigner:
    return request.app.state.signer  # type: ignore[no-any-return]


def current_user(request: Request, session: SessionDep) -> StaffUser:
    """The signed-in, active user of a session that was not ended; sets ``request.state.user``
    and ``request.state.csrf``."""
    data = signer(request).read(request.cookies.get(SESSION_COOKIE))
    user = session_user(session=session, data=data) if data else None
    if data is None or user is None:
        target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        raise LoginRequired(target)
    request.state.user = user
    request.state.csrf = signer(request).csrf_for(data.sid)
    request.state.sid = data.sid
    return user


StaffDep = Annotated[StaffUser, Depends(current_user)]


def allowed(action: str) -> Callable[[StaffUser], StaffUser]:
    """A dependency admitting staff who may do ``action``; others get 403."""
    needed = PERMISSIONS[action]  # an unknown action fails at import, not on a request

    def check(user: StaffDep) -> StaffUser:
        if not user.may(action):
            raise HTTPException(status_code=403, detail=f"this page needs the {needed} role")
        return user

    return check


UploadDep = Annotated[StaffUser, Depends(allowed("upload"))]
DraftPolicyDep = Annotated[StaffUser, Depends(allowed("draft_policy"))]
BacktestDep = Annotated[StaffUser, Depends(allowed("backtest"))]
DecideDep = Annotated[StaffUser, Depends(allowed("decide"))]
PublishDep = Annotated[StaffUser, Depends(allowed("publish"))]
ActivatePolicyDep = Annotated[StaffUser, Depends(allowed("activate_policy"))]
ManageUsersDep = Annotated[StaffUser, Depends(allowed("manage_users"))]


async def csrf_protected(request: Request, user: StaffDep) -> None:
    """Refuse a form post whose ``csrf`` field does not match the session (403)."""
    form = await request.form()
    token = form.get("csrf")
    if not signer(request).csrf_ok(request.state.sid, token if isinstance(token, str) else None):
        raise HTTPException(status_code=403, detail="the form's security token is missing or old")


CsrfDep = Annotated[None, Depends(csrf_protected)]
