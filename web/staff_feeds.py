"""Staff page of the feeds: health of each feed, the newest rejected rows, a manual upload."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Annotated

from fastapi import APIRouter, File, Form, Request, UploadFile
from fastapi.responses import HTMLResponse

from server.services.auth import has_role
from server.services.feeds import (
    FeedFileError,
    UnknownFeedError,
    feeds_page,
    load_catalogue,
    upload_payload,
)
from web.deps import AnalystDep, CsrfDep, SessionDep, SettingsDep, StaffDep
from web.templating import render

router = APIRouter(tags=["staff"])


UPLOAD_ROLE = "analyst"


@router.get("/feeds", response_class=HTMLResponse)
def feeds(
    request: Request, session: SessionDep, settings: SettingsDep, user: StaffDep,
    feed: str | None = None, upload: str | None = None,
) -> HTMLResponse:
    """Every feed's health and the newest rejected rows (optionally of one feed).

    The upload form (only for roles that may upload) preselects ``upload`` (the feed of the
    last upload, passed back by the receipt page), else the push feed the demo documents.
    """
    catalogue = load_catalogue(settings)
    page = feeds_page(session=session, catalogue=catalogue, now=datetime.now(UTC),
                      time_zone=settings.time_zone, feed=feed)
    chosen = upload if upload in catalogue.feeds else page.upload_default
    return render(
        request, "staff/feeds.html",
        {"page": page, "feed_names": sorted(catalogue.feeds), "selected": feed,
         "upload_feed": chosen, "can_upload": has_role(user.role, UPLOAD_ROLE),
         "upload_role": UPLOAD_ROLE},
    )


@router.post("/feeds/upload", response_class=HTMLResponse)
def upload(
    request: Request, settings: SettingsDep, user: AnalystDep, _csrf: CsrfDep,
    feed: Annotated[str, Form()],
    file: Annotated[UploadFile, File()], dry_run: Annotated[bool, Form()] = False,
) -> HTMLResponse:
    """Take in an uploaded file for a feed and show its receipt.

    A plain (sync) route: FastAPI has parsed the form before the call and runs the route in its
    thread pool, so the ingestion does not block the event loop.
    """
    content = file.file.read()
    catalogue = load_catalogue(settings)
    error, receipt = None, None
    try:
        receipt = upload_payload(
            request.app.state.database, catalogue=catalogue, feed_name=feed,
            filename=file.filename or "upload", content=content, actor=user.name,
            time_zone=settings.time_zone, dry_run=dry_run,
        )
    except (FeedFileError, UnknownFeedError) as exc:
        error = str(exc)
    if receipt is not None and not receipt.unchanged and receipt.rows_accepted and not dry_run:
        request.app.state.evaluations.request()  # coalesced, off the request path
    return render(
        request, "staff/feeds_receipt.html",
        {"receipt": receipt, "error": error, "feed": feed},
        status_code=422 if error else 200,
    )
