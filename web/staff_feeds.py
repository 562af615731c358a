"""Staff page of the feeds: health of each feed, the newest rejected rows, a manual upload.

The upload is capped like the push: a body over ``Settings.upload_max_bytes`` answers 413 with a
plain message, refused before reading when its ``Content-Length`` says so and otherwise as soon
as that many bytes have arrived (:class:`CappedUploadRoute`). The form parser spools the file to
disk past 1 MB and ingestion reads it from there in blocks, so memory does not grow with it.
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable
from datetime import UTC, datetime
from typing import Annotated

from fastapi import APIRouter, File, Form, HTTPException, Request, UploadFile
from fastapi.responses import HTMLResponse
from fastapi.routing import APIRoute
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import Response
from starlette.types import Message

from server.readmodels.feeds_page import feeds_page
from server.services.feed_push import upload_payload
from server.services.feeds import (
    FeedFileError,
    UnconfirmedRevisionsError,
    UnknownFeedError,
    load_catalogue,
)
from server.services.users import PERMISSIONS
from web import held_uploads
from web.deps import CsrfDep, SessionDep, SettingsDep, StaffDep, UploadDep
from web.templating import render


class UploadTooLargeError(ValueError):
    """An uploaded body is (or declares to be) larger than ``Settings.upload_max_bytes``."""

    def __init__(self, limit: int, size: int | None) -> None:
        self.limit = limit
        got = f"{size:,} bytes" if size is not None else "more"
        super().__init__(f"the upload of {got} is over the limit of {limit:,} bytes "
                         "(TIERWISE_UPLOAD_MAX_BYTES); split the file or ask an administrator")


def _too_large(exc: UploadTooLargeError) -> HTTPException:
    return HTTPException(status_code=413, detail=str(exc))


class CappedUploadRoute(APIRoute):
    """A route whose request body may not pass ``Settings.upload_max_bytes`` (413).

    The check wraps the ASGI ``receive`` before FastAPI parses the form, so an oversized file is
    never read whole: a declared ``Content-Length`` over the limit is refused at once, and a body
    sent without one is cut off when the bytes received pass the limit.
    """

    def get_route_handler(self) -> Callable[[Request], Awaitable[Response]]:
        handler = super().get_route_handler()

        async def capped(request: Request) -> Response:
            limit = request.app.state.settings.upload_max_bytes
            declared = request.headers.get("content-length", "").strip()
            if declared.isascii() and declared.isdigit() and int(declared) > limit:
                raise _too_large(UploadTooLargeError(limit, int(declared)))
            receive, seen = request.receive, 0

            async def counted() -> Message:
                nonlocal seen
                message = await receive()
                seen += len(message.get("body", b""))
                if seen > limit:
                    raise UploadTooLargeError(limit, None)
                return message

            try:
                return await handler(Request(request.scope, counted))
            except UploadTooLargeError as exc:
                raise _too_large(exc) from None
            except StarletteHTTPException as exc:  # FastAPI turns errors while parsing the form
                # into a 400 (Starlette's class) caused by the original error

                if isinstance(exc.__cause__, UploadTooLargeError):
                    raise _too_large(exc.__cause__) from None
                raise

        return capped


router = APIRouter(tags=["staff"], route_class=CappedUploadRoute)




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
         "upload_feed": chosen, "can_upload": user.may("upload"),
         "upload_role": PERMISSIONS["upload"]},
    )


@router.post("/feeds/upload", response_class=HTMLResponse)
def upload(
    request: Request, settings: SettingsDep, user: UploadDep, _csrf: CsrfDep,
    feed: Annotated[str, Form()],
    file: Annotated[UploadFile | None, File()] = None, dry_run: Annotated[bool, Form()] = False,
    held: Annotated[str, Form()] = "", confirmed: Annotated[str, Form()] = "",
) -> HTMLResponse:
    """Take in an uploaded file for a feed and show its receipt.

    An upload that would revise values another feed sent stores nothing: the page lists those
    values and asks for confirmation (409). The file is held meanwhile (:mod:`web.held_uploads`,
    outside the database); confirming posts ``held`` and ``confirmed`` (the digest of the
    revisions shown) back, and the file is taken in only if it would still revise exactly those.

    A plain (sync) route: FastAPI has parsed the form before the call and runs the route in its
    thread pool, so the ingestion does not block the event loop.
    """
    catalogue = load_catalogue(settings)
    error, receipt, asking = None, None, None
    holding = None
    try:
        if held:
            holding = held_uploads.open_held(held, actor=user.name, feed=feed)
            name, content = holding.filename, holding.open()
        elif file is not None:
            name, content = file.filename or "upload", file.file
        else:
            raise held_uploads.HeldUploadError("choose a file to upload")
        try:
            receipt = upload_payload(
                request.app.state.database, catalogue=catalogue, feed_name=feed,
                filename=name, content=content, actor=user.name,
                time_zone=settings.time_zone, dry_run=dry_run, confirmed=confirmed,
            )
        finally:
            if holding is not None:
                content.close()
    except UnconfirmedRevisionsError as exc:
        receipt = exc.receipt  # type: ignore[assignment]
        if holding is None:
            assert file is not None
            file.file.seek(0)
            holding = held_uploads.hold(file.file, filename=name, actor=user.name, feed=feed)
        asking = {"held": holding.token, "digest": exc.digest, "again": bool(confirmed)}
    except (FeedFileError, UnknownFeedError, held_uploads.HeldUploadError) as exc:
        error = str(exc)
    else:
        if holding is not None:
            holding.discard()
    if receipt is not None and not receipt.unchanged and receipt.rows_accepted and not dry_run \
            and asking is None:
        request.app.state.evaluations.request()  # coalesced, off the request path
    return render(
        request, "staff/feeds_receipt.html",
        {"receipt": receipt, "error": error, "feed": feed, "asking": asking},
        status_code=422 if error else 409 if asking else 200,
    )
