"""Review queue: confirm or override each pending change with a reason; publish; history.

A decision names the assessment it answers and the official tier it saw (the form's hidden
``official_tier`` and ``official_decision`` fields, ``"none"`` when the district had none; the
JSON API's ``official_tier`` and ``official_decision_id``). When someone decided the district
meanwhile, or new data changed the recommendation, nothing is stored: the page answers 409 with
the typed reason kept (the API answers 409 with the reason in its body).
"""

from __future__ import annotations

from typing import Annotated, Literal

from fastapi import APIRouter, Depends, Form, Header, HTTPException, Query, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from pydantic import BaseModel, Field

from server.readmodels.queue import review_queue
from server.services.review_decisions import (
    DecisionConflictError,
    RecommendationChangedError,
    ReviewError,
    decide,
    policy_of_assessment,
)
from server.services.review_publication import publish
from web.deps import (
    INT32_MAX,
    INT64_MAX,
    BigRowId,
    CsrfDep,
    DecideDep,
    NotifyDep,
    PublishDep,
    SessionDep,
    SettingsDep,
    StaffDep,
    signer,
)
from web.templating import render

router = APIRouter(tags=["staff"])
api_router = APIRouter(tags=["staff"])

NONE = "none"


@router.get("/review", response_class=HTMLResponse)
def queue(
    request: Request, session: SessionDep, user: StaffDep,
    show_all: Annotated[str, Query(alias="all")] = "", region: str = "", published: str = "",
    policy: str = "",
) -> Response:
    """Pending changes, unpublished decisions and the decision history (newest 30, or all), of
    every active policy or of one (``?policy=NAME``; 404 for a policy that is not active)."""
    q = review_queue(session=session, show_all=show_all == "1", region=region.strip() or None,
                     policy=policy.strip() or None)
    return render(request, "staff/review.html", {"q": q, "published": published})


def _seen(field: str, value: str) -> int | None:
    """A hidden field of what the form saw: a whole number, or ``none``."""
    text = value.strip()
    if text == NONE:
        return None
    digits = text.removeprefix("-")
    if not (digits.isascii() and digits.isdigit()) or len(digits) > 18:
        raise ReviewError(field, f"{value!r} is neither a whole number nor {NONE!r}")
    return int(text)


@router.post("/review/{assessment_id}", response_model=None)
def decide_one(
    request: Request, session: SessionDep, user: DecideDep, _csrf: CsrfDep,
    assessment_id: BigRowId, action: Annotated[str, Form()],
    official_tier: Annotated[str, Form()], official_decision: Annotated[str, Form()],
    settings: SettingsDep, reason: Annotated[str, Form()] = "",
    tier: Annotated[str, Form()] = "",
) -> Response:
    """Confirm (``action=confirm``) or override (``action=override`` with ``tier``).

    When new data changed the recommendation, or another approver decided the district, while
    the form was open, the queue is shown again (409) with a notice and the typed reason kept.
    A decision that cannot be taken as posted (no reason, an override without a tier) shows the
    queue again (422) with the problem beside the form, the typed reason and chosen tier kept.
    """
    try:
        decide(session=session, assessment_id=assessment_id, user=user.name,
               accept=action == "confirm",
               tier=int(tier) if tier.strip().isascii() and tier.strip().isdigit() else None,
               reason=reason, official_tier=_seen("official_tier", official_tier),
               official_decision_id=_seen("official_decision", official_decision),
               time_zone=settings.time_zone)
    except (RecommendationChangedError, DecisionConflictError) as refused:
        changed = refused if isinstance(refused, RecommendationChangedError) else None
        conflict = refused if isinstance(refused, DecisionConflictError) else None
        return render(request, "staff/review.html", {
            "q": review_queue(session=session), "published": "", "changed": changed,
            "conflict": conflict, "kept_reason": {refused.region: reason},
            "kept_policy": policy_of_assessment(session=session, assessment_id=assessment_id),
        }, status_code=409)
    except ReviewError as invalid:  # raised before anything is written
        q = review_queue(session=session)
        region = next((p.region for p in q.pending if p.assessment_id == assessment_id), "")
        return render(request, "staff/review.html", {
            "q": q, "published": "", "kept_reason": {region: reason},
            "kept_policy": policy_of_assessment(session=session, assessment_id=assessment_id),
            "kept_tier": {region: tier.strip()},
            "invalid": {"region": region, "argument": invalid.argument,
                        "action": action, "message": str(invalid), "reason": reason},
        }, status_code=422)
    return RedirectResponse("/staff/review", status_code=303)


@router.post("/publish")
def publish_all(
    session: SessionDep, user: PublishDep, _csrf: CsrfDep, notify: NotifyDep,
    settings: SettingsDep, policy: Annotated[str, Form()] = "",
) -> RedirectResponse:
    """Publish every unpublished decision to the public view ("nothing" when there is none),
    of every active policy or of the one named in the form's ``policy`` field."""
    result = publish(session=session, user=user.name, notify=notify,
                     time_zone=settings.time_zone, policy=policy.strip() or None)
    flag = "1" if result.decisions else "none"
    return RedirectResponse(f"/staff/review?published={flag}", status_code=303)


# -- JSON API ---------------------------------------------------------------------------------
class DecisionIn(BaseModel):
    """A decision posted to the JSON API; ``official_tier`` and ``official_decision_id`` are
    what the client saw (``null`` when the district had no official tier) and are required."""

    action: Literal["confirm", "override"]
    reason: str = Field(min_length=1)
    tier: int | None = Field(default=None, ge=-1, le=INT32_MAX)
    official_tier: int | None = Field(ge=-1, le=INT32_MAX)
    official_decision_id: int | None = Field(ge=1, le=INT64_MAX)


def csrf_header(
    request: Request, user: StaffDep, x_csrf_token: Annotated[str, Header()] = ""
) -> None:
    """Refuse an API post whose ``X-CSRF-Token`` header does not match the session (403)."""
    if not signer(request).csrf_ok(request.state.sid, x_csrf_token or None):
        raise HTTPException(status_code=403, detail="the X-CSRF-Token header is missing or old")


@api_router.post("/api/review/{assessment_id}/decision", status_code=201, response_model=None)
def decide_api(
    session: SessionDep, user: DecideDep, _csrf: Annotated[None, Depends(csrf_header)],
    assessment_id: BigRowId, body: DecisionIn, settings: SettingsDep,
) -> Response:
    """Confirm or override one pending change; 409 (with the reason sent) when the district was
    decided, or its recommendation changed, since the client read it."""
    try:
        made = decide(session=session, assessment_id=assessment_id, user=user.name,
                      accept=body.action == "confirm", tier=body.tier, reason=body.reason,
                      official_tier=body.official_tier,
                      official_decision_id=body.official_decision_id,
                      time_zone=settings.time_zone)
    except (RecommendationChangedError, DecisionConflictError) as refused:
        kind = ("decided_meanwhile" if isinstance(refused, DecisionConflictError)
                else "recommendation_changed")
        return JSONResponse(status_code=409, content={
            "detail": str(refused), "conflict": kind, "region": refused.region,
            "reason": body.reason,
        })
    return JSONResponse(status_code=201, content={
        "id": made.id, "region": made.region, "tier": made.tier, "tier_name": made.tier_name,
        "kind": made.kind, "effective_date": made.effective_date.isoformat(),
        "assessment_id": made.assessment_id,
    })
