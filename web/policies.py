"""Policies: the active ruleset shown readably, versions with diffs, draft upload and check, and
backtests of a version run in the background (:mod:`server.services.backtest_jobs`)."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Form, Request, UploadFile
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from server.services.backtest_jobs import BacktestJobs
from server.services.feeds import catalogue_limits, load_catalogue
from server.services.policies import (
    DraftCheck,
    activate_version,
    check_draft,
    policy_comparison,
    policy_diff,
    policy_view,
    retire_version,
    store_draft,
    versions,
)
from web.backtests import OUTLINE, tier_strip
from web.deps import (
    INT32_MAX,
    ActivatePolicyDep,
    BacktestDep,
    CsrfDep,
    DraftPolicyDep,
    NotifyDep,
    RowId,
    SessionDep,
    SettingsDep,
    StaffDep,
)
from web.templating import render

router = APIRouter(tags=["staff"])

_BOM = b"\xef\xbb\xbf"


def decode_draft(raw: bytes, filename: str) -> str | DraftCheck:
    """The text of an uploaded draft, or a failed check naming the first byte that is not UTF-8.

    A byte-order mark is dropped. Nothing is replaced: a draft saved in another encoding (such
    as Latin-1) is refused with its byte offset and line rather than stored with "\ufffd" in
    its tier texts.
    """
    body = raw[len(_BOM):] if raw.startswith(_BOM) else raw
    try:
        return body.decode("utf-8")
    except UnicodeDecodeError as exc:
        offset = exc.start + (len(raw) - len(body))
        line = raw.count(b"\n", 0, offset) + 1
        return DraftCheck(ok=False, message=(
            f"{filename}: line {line}, byte {offset}: the file is not valid UTF-8 text "
            f"(byte 0x{raw[offset]:02x}). It was probably saved in another encoding (such as "
            "Windows-1252 or Latin-1): save it as UTF-8 and upload it again."))


@router.get("/policies", response_class=HTMLResponse)
def policies(
    request: Request, session: SessionDep, user: StaffDep, id: RowId | None = None
) -> Response:
    """A version (default: the active one) as tiers and a thresholds table; all versions."""
    return render(request, "staff/policies.html", {
        "view": policy_view(session=session, ruleset_id=id), "versions": versions(session=session),
        "check": None, "backtests": _jobs(request).recent(session=session),
    })


@router.get("/policies/diff", response_class=HTMLResponse)
def diff(
    request: Request, session: SessionDep, user: StaffDep, old: RowId, new: RowId
) -> Response:
    """Two versions compared item by item (with units), and the line diff of their YAML."""
    return render(request, "staff/policy_diff.html", {
        "comparison": policy_comparison(session=session, old_id=old, new_id=new),
        "lines": policy_diff(session=session, old_id=old, new_id=new)})


@router.post("/policies/draft", response_class=HTMLResponse)
def draft(
    request: Request, session: SessionDep, user: DraftPolicyDep, _csrf: CsrfDep,
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
        decoded = decode_draft(file.file.read(), name)
        if isinstance(decoded, DraftCheck):
            return render(request, "staff/policies.html", {
                "view": policy_view(session=session), "versions": versions(session=session),
                "check": decoded, "draft_text": "",
                "backtests": _jobs(request).recent(session=session),
            }, status_code=422)
        text = decoded
    result = check_draft(text, filename=name, session=session)
    if result.ok and store:
        new_id = store_draft(session=session, text=text, author=user.name, filename=name)
        return RedirectResponse(f"/staff/policies?id={new_id}#active-h", status_code=303)
    return render(request, "staff/policies.html", {
        "view": policy_view(session=session), "versions": versions(session=session),
        "check": result, "draft_text": text, "backtests": _jobs(request).recent(session=session),
    }, status_code=200 if result.ok else 422)


@router.post("/policies/{ruleset_id}/activate")
def activate(
    session: SessionDep, user: ActivatePolicyDep, _csrf: CsrfDep, notify: NotifyDep,
    settings: SettingsDep, ruleset_id: RowId,
) -> RedirectResponse:
    """Make a version active and evaluate it (admins only)."""
    activate_version(session=session, ruleset_id=ruleset_id, actor=user.name, notify=notify,
                     stale_after=catalogue_limits(load_catalogue(settings)))
    return RedirectResponse("/staff/policies", status_code=303)


@router.post("/policies/{ruleset_id}/retire")
def retire(
    session: SessionDep, user: ActivatePolicyDep, _csrf: CsrfDep, ruleset_id: RowId,
) -> RedirectResponse:
    """Stop running an active policy version; the other active policies go on (admins only)."""
    retire_version(session=session, ruleset_id=ruleset_id, actor=user.name)
    return RedirectResponse("/staff/policies", status_code=303)


def _row_id(text: str) -> int | None:
    """A ruleset id from a form field ("" or anything that is not a key: None)."""
    text = text.strip()
    if not (text.isascii() and text.isdigit() and len(text) <= 10):
        return None
    return int(text) if 1 <= int(text) <= INT32_MAX else None


def _jobs(request: Request) -> BacktestJobs:
    return request.app.state.backtests  # type: ignore[no-any-return]


@router.post("/policies/{ruleset_id}/backtest")
def backtest(
    request: Request, session: SessionDep, user: BacktestDep, _csrf: CsrfDep, ruleset_id: RowId,
    compare: Annotated[str, Form()] = "", as_known: Annotated[str, Form()] = "",
) -> RedirectResponse:
    """Start a background backtest of a version (optionally beside another, e.g. the active)."""
    job_id = _jobs(request).start(
        session=session, ruleset_id=ruleset_id,
        compare_id=_row_id(compare),
        as_known=bool(as_known), user=user.name,
    )
    return RedirectResponse(f"/staff/policies/backtests/{job_id}", status_code=303)


@router.get("/policies/backtests/{job_id}", response_class=HTMLResponse)
def backtest_job(
    request: Request, session: SessionDep, user: BacktestDep, job_id: str
) -> Response:
    """A backtest's progress (the page reloads itself every 2 s while it runs), then its result.

    Any worker answers: the job's state is read from the database."""
    job = _jobs(request).status(session=session, job_id=job_id)
    strips = [tier_strip(f) for f in job.results] if job.state == "done" else []
    return render(request, "staff/backtest.html", {"job": job, "strips": strips,
                                                       "outline": OUTLINE})
