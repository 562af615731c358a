"""Staff pages: the morning overview, the district page and the explanation of a day."""

from __future__ import annotations

from datetime import date

from fastapi import APIRouter, Query, Request
from fastapi.responses import HTMLResponse, Response

from server.services.dossier import district_dossier, explanation_page
from server.services.morning import morning_overview
from web.charts import criterion_figure, figure_json, timeline_figure
from web.deps import SessionDep, StaffDep
from web.templating import render

router = APIRouter(tags=["staff"])


@router.get("/", response_class=HTMLResponse)
def home(
    request: Request, session: SessionDep, user: StaffDep,
    sort: str = "pending", q: str = "", tier: str = "", pending: str = "",
    page: int = Query(1, ge=1),
) -> Response:
    """Every district: official and recommended tier, signals, indicators; feeds; changes."""
    tier_filter = int(tier) if tier.strip().isdigit() else None
    view = morning_overview(session=session, sort=sort, query=q, tier=tier_filter,
                            pending_only=pending == "true", page=page)
    key = f"staff|{view.ruleset}|{view.data_cutoff}|{len(view.every)}"
    shapes = request.app.state.maps.get(key, ((x.code, x.geometry) for x in view.every))
    return render(request, "staff/home.html", {
        "view": view, "map": shapes, "by_code": {line.code: line for line in view.every},
        "sort": sort, "q": q, "tier": tier_filter, "pending_only": pending == "true",
    })


@router.get("/district/{code}", response_class=HTMLResponse)
def district(
    request: Request, code: str, session: SessionDep, user: StaffDep,
    start: date | None = None, end: date | None = None,
) -> Response:
    """Charts per indicator with thresholds and bands, the tier timeline, recent revisions."""
    dossier = district_dossier(session=session, code=code, start=start, end=end)
    charts = [figure_json(criterion_figure(c, dossier.tier_names)) for c in dossier.criteria]
    return render(request, "staff/district.html", {
        "d": dossier, "charts": charts, "timeline": figure_json(timeline_figure(dossier)),
    })


@router.get("/district/{code}/explain", response_class=HTMLResponse)
def explain(
    request: Request, code: str, session: SessionDep, user: StaffDep, day: date | None = None
) -> Response:
    """Why the district has its recommended tier on a day: a printable one-page briefing."""
    return render(request, "staff/explain.html",
                  {"e": explanation_page(session=session, code=code, day=day)})
