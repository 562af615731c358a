"""Push endpoint of the feeds: ``POST /api/feeds/{name}/push`` with the feed's bearer token.

The body is CSV (``text/csv``) or JSON records (``application/json``). The answer is a receipt:
vintage id, rows accepted, rows rejected with line and reason. 401 for a missing or wrong token,
404 for an unknown feed, 422 for a file rejected whole (the message names line and problem).
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, BackgroundTasks, Header, Request
from fastapi.responses import JSONResponse

from server.services.feeds import (
    FeedFileError,
    FeedTokenError,
    NotAPushFeedError,
    UnknownFeedError,
    evaluate_after_ingest,
    load_catalogue,
    push_payload,
)
from server.services.ingest import IngestReceipt
from web.deps import NotifyDep, SettingsDep

router = APIRouter(tags=["feeds"])


def receipt_json(receipt: IngestReceipt) -> dict[str, Any]:
    return {
        "feed": receipt.feed,
        "vintage_id": receipt.vintage_id,
        "unchanged": receipt.unchanged,
        "received_at": receipt.received_at.isoformat(),
        "checksum": receipt.checksum,
        "rows_accepted": receipt.rows_accepted,
        "rows_rejected": receipt.rows_rejected,
        "reasons": {r.reason: r.count for r in receipt.reasons},
        "rejected": [
            {"line": r.line, "reason": r.reason, "message": r.message}
            for r in receipt.rejections
        ],
    }


def _bearer(authorization: str | None) -> str | None:
    if not authorization:
        return None
    scheme, _, token = authorization.partition(" ")
    return token.strip() if scheme.lower() == "bearer" and token.strip() else None


@router.post("/api/feeds/{name}/push")
async def push(
    name: str, request: Request, settings: SettingsDep, notify: NotifyDep,
    background: BackgroundTasks,
    authorization: Annotated[str | None, Header()] = None,
    content_type: Annotated[str, Header()] = "text/csv",
) -> JSONResponse:
    """Take in one pushed file as one vintage; answers with the receipt."""
    body = await request.body()
    db = request.app.state.database
    try:
        receipt = push_payload(
            db, catalogue=load_catalogue(settings), feed_name=name,
            token=_bearer(authorization), content=body, content_type=content_type,
            time_zone=settings.time_zone,
        )
    except UnknownFeedError as exc:
        return JSONResponse({"detail": str(exc)}, status_code=404)
    except FeedTokenError as exc:
        return JSONResponse({"detail": str(exc)}, status_code=401,
                            headers={"WWW-Authenticate": "Bearer"})
    except (FeedFileError, NotAPushFeedError) as exc:
        return JSONResponse({"detail": str(exc)}, status_code=422)
    if not receipt.unchanged and receipt.rows_accepted:
        background.add_task(evaluate_after_ingest, db, notify)
    status = 200 if receipt.unchanged else 201
    return JSONResponse(receipt_json(receipt), status_code=status)
