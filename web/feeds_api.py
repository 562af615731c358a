"""Push endpoint of the feeds: ``POST /api/feeds/{name}/push`` with the feed's bearer token.

The body is CSV (``text/csv``) or JSON records (``application/json``). The answer is a receipt:
vintage id, rows accepted, rows rejected with line (CSV) or record (JSON) and reason; a body
identical to a stored vintage counts nothing and names that vintage. 401 for a missing or wrong
token, 404 for an unknown feed, 413 for a body over the size limit, 422 for a file rejected whole
(the message names line and problem).

The token is checked before a byte of the body is read, a declared ``Content-Length`` over the
limit is refused at once, and the body is read from the stream only up to the limit. The limit is
the feed definition's ``max_bytes`` when its source has one, else :data:`MAX_PUSH_BYTES`. The
database and parsing work runs in the thread pool, off the event loop.
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Header, Request
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool

from server.services.feed_push import FeedTokenError, NotAPushFeedError, check_push, ingest_push
from server.services.feeds import FeedDefinition, FeedFileError, UnknownFeedError, load_catalogue
from server.services.ingest import IngestReceipt
from web.deps import SettingsDep

router = APIRouter(tags=["feeds"])

# Largest pushed body accepted when the feed definition sets no ``max_bytes``: 50 MB, about a
# year of daily long-format rows for a few hundred regions and measures (common practice, no
# source). A lead-owned setting may replace it later.
MAX_PUSH_BYTES = 50_000_000


class BodyTooLargeError(ValueError):
    """The pushed body is (or declares to be) larger than the feed's limit."""

    def __init__(self, feed: str, limit: int, size: int | None) -> None:
        self.limit = limit
        got = f"{size} bytes" if size is not None else "more"
        super().__init__(f"push to feed {feed!r}: body of {got} is over the limit of {limit} bytes")


def push_limit(feed: FeedDefinition) -> int:
    """The body size limit of ``feed``: its source's ``max_bytes``, else :data:`MAX_PUSH_BYTES`."""
    limit = getattr(feed.source, "max_bytes", None)
    return int(limit) if isinstance(limit, int) and limit > 0 else MAX_PUSH_BYTES


async def read_capped(request: Request, *, feed: str, limit: int) -> bytes:
    """The request body, refused before reading when ``Content-Length`` is over ``limit`` and
    while reading as soon as more than ``limit`` bytes have arrived."""
    declared = request.headers.get("content-length")
    if declared is not None and declared.strip().isdigit() and int(declared) > limit:
        raise BodyTooLargeError(feed, limit, int(declared))
    chunks, size = [], 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise BodyTooLargeError(feed, limit, None)
        chunks.append(chunk)
    return b"".join(chunks)


def receipt_json(receipt: IngestReceipt) -> dict[str, Any]:
    """The receipt as JSON (``docs/feeds.md``, "Running feeds"): an unchanged payload counts
    zero rows and names the vintage it is identical to; a rejected JSON record is given by its
    ``record`` position, a CSV row by its ``line``."""
    return {
        "feed": receipt.feed,
        "vintage_id": receipt.vintage_id,
        "unchanged": receipt.unchanged,
        "identical_to_vintage": receipt.identical_to,
        "received_at": receipt.received_at.isoformat(),
        "checksum": receipt.checksum,
        "rows_accepted": receipt.rows_accepted,
        "rows_rejected": receipt.rows_rejected,
        "reasons": {r.reason: r.count for r in receipt.reasons},
        "rejected": [
            {receipt.unit: r.line, "reason": r.reason, "message": r.message}
            for r in receipt.rejections
        ],
        "revised": receipt.revised,
        "revised_other_feeds": receipt.revised_other_feeds,
        "revisions": [
            {"region": v.region, "measure": v.measure, "date": v.day.isoformat(),
             "old": v.old, "new": v.new, "old_feed": v.old_feed,
             "old_vintage_id": v.old_vintage_id, receipt.unit: v.line}
            for v in receipt.revisions
        ],
    }


def _bearer(authorization: str | None) -> str | None:
    if not authorization:
        return None
    scheme, _, token = authorization.partition(" ")
    return token.strip() if scheme.lower() == "bearer" and token.strip() else None


@router.post("/api/feeds/{name}/push")
async def push(
    name: str, request: Request, settings: SettingsDep,
    authorization: Annotated[str | None, Header()] = None,
    content_type: Annotated[str, Header()] = "text/csv",
) -> JSONResponse:
    """Take in one pushed file as one vintage; answers with the receipt."""
    db = request.app.state.database
    try:
        catalogue = await run_in_threadpool(load_catalogue, settings)
        feed = await run_in_threadpool(
            lambda: check_push(db, catalogue=catalogue, feed_name=name,
                               token=_bearer(authorization))
        )
        body = await read_capped(request, feed=feed.name, limit=push_limit(feed))
        receipt = await run_in_threadpool(
            lambda: ingest_push(db, feed=feed, content=body, content_type=content_type,
                                time_zone=settings.time_zone,
                                precedence=catalogue.precedence())
        )
    except UnknownFeedError as exc:
        return JSONResponse({"detail": str(exc)}, status_code=404)
    except FeedTokenError as exc:
        return JSONResponse({"detail": str(exc)}, status_code=401,
                            headers={"WWW-Authenticate": "Bearer"})
    except BodyTooLargeError as exc:
        return JSONResponse({"detail": str(exc)}, status_code=413)
    except (FeedFileError, NotAPushFeedError) as exc:
        return JSONResponse({"detail": str(exc)}, status_code=422)
    if not receipt.unchanged and receipt.rows_accepted:
        request.app.state.evaluations.request()  # coalesced, off the request path
    status = 200 if receipt.unchanged else 201
    return JSONResponse(receipt_json(receipt), status_code=status)
