"""Review queue: confirm or override each pending change with a reason; publish; history."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Form, Query, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from server.services.queue import review_queue
from server.services.review import RecommendationChangedError, decide, publish
from web.deps import ApproverDep, BigRowId, CsrfDep, NotifyDep, SessionDep, StaffDep
from web.templating import render

router = APIRouter(tags=["staff"])


@router.get("/review", response_class=HTMLResponse)
def queue(
    request: Request, session: SessionDep, user: StaffDep,
    show_all: Annotated[str, Query(alias="all")] = "", region: str = "", published: str = "",
) -> Response:
    """Pending changes, unpublished decisions and the decision history (newest 30, or all)."""
    q = review_queue(session=session, show_all=show_all == "1", region=region.strip() or None)
    return render(request, "staff/review.html", {"q": q, "published": published})


@router.post("/review/{assessment_id}", response_model=None)
def decide_one(
    request: Request, session: SessionDep, user: ApproverDep, _csrf: CsrfDep,
    assessment_id: BigRowId, action: Annotated[str, Form()], reason: Annotated[str, Form()] = "",
    tier: Annotated[str, Form()] = "",
) -> Response:
    """Confirm (``action=confirm``) or override (``action=override`` with ``tier``).

    When new data changed the recommendation while the form was open, the queue is shown
    again (409) with a notice naming the new recommendation and the typed reason kept.
    """
    try:
        decide(session=session, assessment_id=assessment_id, user=user.name,
               accept=action == "confirm",
               tier=int(tier) if tier.strip().isascii() and tier.strip().isdigit() else None,
               reason=reason)
    except RecommendationChangedError as changed:
        return render(request, "staff/review.html", {
            "q": review_queue(session=session), "published": "", "changed": changed,
            "kept_reason": {changed.region: reason},
        }, status_code=409)
    return RedirectResponse("/staff/review", status_code=303)


@router.post("/publish")
def publish_all(
    session: SessionDep, user: ApproverDep, _csrf: CsrfDep, notify: NotifyDep
) -> RedirectResponse:
    """Publish every unpublished decision to the public view ("nothing" when there is none)."""
    result = publish(session=session, user=user.name, notify=notify)
    flag = "1" if result.decisions else "none"
    return RedirectResponse(f"/staff/review?published={flag}", status_code=303)
