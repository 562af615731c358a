"""Staff pages (the full interface, with login, is its own piece of work)."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse

from server.services.overview import staff_home
from web.deps import SessionDep, TemplatesDep

router = APIRouter(tags=["staff"])


@router.get("/", response_class=HTMLResponse)
def home(request: Request, session: SessionDep, templates: TemplatesDep) -> HTMLResponse:
    """Districts, areas and plants with the newest reference date of each measure, and each
    district's newest recommended tier under the active policy."""
    home = staff_home(session=session)
    return templates.TemplateResponse(
        request, "staff/home.html",
        {"overview": home.data, "recommendations": home.recommendations, "ruleset": home.ruleset},
    )
