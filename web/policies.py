"""Policies: the active ruleset shown readably, versions with diffs, draft upload and check."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Form, Request, UploadFile
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from server.services.policies import (
    activate_version,
    check_draft,
    policy_diff,
    policy_view,
    store_draft,
    versions,
)
from web.deps import AdminDep, AnalystDep, CsrfDep, NotifyDep, SessionDep, StaffDep
from web.templating import render

router = APIRouter(tags=["staff"])


@router.get("/policies", response_class=HTMLResponse)
def policies(
    request: Request, session: SessionDep, user: StaffDep, id: int | None = None
) -> Response:
    """A version (default: the active one) as tiers and a thresholds table; all versions."""
    return render(request, "staff/policies.html", {
        "view": policy_view(session=session, ruleset_id=id), "versions": versions(session=session),
        "check": None,
    })


@router.get("/policies/diff", response_class=HTMLResponse)
def diff(request: Request, session: SessionDep, user: StaffDep, old: int, new: int) -> Response:
    """Line diff of two versions' YAML."""
    return render(request, "staff/policy_diff.html",
                  {"lines": policy_diff(session=session, old_id=old, new_id=new)})


@router.post("/policies/draft", response_class=HTMLResponse)
def draft(
    request: Request, session: SessionDep, user: AnalystDep, _csrf: CsrfDep,
    file: UploadFile | None = None, text: Annotated[str, Form()] = "",
    store: Annotated[str, Form()] = "",
) -> Response:
    """Validate an uploaded (or pasted) draft; store it as a draft version when asked.

    A plain (sync) route: the form is parsed before the call and the route runs in the thread
    pool, so parsing and storing do not block the event loop.
    """
    name = "draft.yaml"
    if file is not None and file.filename:
        name = file.filename
        text = file.file.read().decode("utf-8", errors="replace")
    result = check_draft(text, filename=name)
    if result.ok and store:
        new_id = store_draft(session=session, text=text, author=user.name, filename=name)
        return RedirectResponse(f"/staff/policies?id={new_id}", status_code=303)
    return render(request, "staff/policies.html", {
        "view": policy_view(session=session), "versions": versions(session=session),
        "check": result, "draft_text": text,
    }, status_code=200 if result.ok else 422)


@router.post("/policies/{ruleset_id}/activate")
def activate(
    session: SessionDep, user: AdminDep, _csrf: CsrfDep, notify: NotifyDep, ruleset_id: int
) -> RedirectResponse:
    """Make a version active and evaluate it (admins only)."""
    activate_version(session=session, ruleset_id=ruleset_id, actor=user.name, notify=notify)
    return RedirectResponse("/staff/policies", status_code=303)
