"""Public, read-only pages for residents (no login)."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse

from server.services.overview import public_districts
from web.deps import SessionDep, TemplatesDep

router = APIRouter(tags=["public"])


@router.get("/", response_class=HTMLResponse)
def index(request: Request, session: SessionDep, templates: TemplatesDep) -> HTMLResponse:
    """Every district of the area, with the cautions that go with published tiers."""
    districts = public_districts(session=session)
    return templates.TemplateResponse(request, "public/index.html", {"districts": districts})


@router.get("/api/public/districts")
def districts_json(session: SessionDep) -> list[dict[str, str | None]]:
    """The public district list as JSON."""
    return [
        {"code": d.code, "name": d.name, "area": d.parent_name}
        for d in public_districts(session=session)
    ]
