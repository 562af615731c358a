"""Review queue: confirm or override each pending change with a reason; publish; history."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from server.services.queue import review_queue
from server.services.review import decide, publish
from web.deps import ApproverDep, CsrfDep, NotifyDep, SessionDep, StaffDep
from web.templating import render

router = APIRouter(tags=["staff"])


@router.get("/review", response_class=HTMLResponse)
def queue(request: Request, session: SessionDep, user: StaffDep) -> Response:
    """Pending changes, unpublished decisions and the decision history."""
    return render(request, "staff/review.html", {"q": review_queue(session=session)})


@router.post("/review/{assessment_id}")
def decide_one(
    session: SessionDep, user: ApproverDep, _csrf: CsrfDep, assessment_id: int,
    action: Annotated[str, Form()], reason: Annotated[str, Form()] = "",
    tier: Annotated[str, Form()] = "",
) -> RedirectResponse:
    """Confirm (``action=confirm``) or override (``action=override`` with ``tier``)."""
    decide(session=session, assessment_id=assessment_id, user=user.name,
           accept=action == "confirm", tier=int(tier) if tier.strip().isdigit() else None,
           reason=reason)
    return RedirectResponse("/staff/review", status_code=303)


@router.post("/publish")
def publish_all(
    session: SessionDep, user: ApproverDep, _csrf: CsrfDep, notify: NotifyDep
) -> RedirectResponse:
    """Publish every unpublished decision to the public view."""
    publish(session=session, user=user.name, notify=notify)
    return RedirectResponse("/staff/review?published=1", status_code=303)
