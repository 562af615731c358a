"""Staff pages: the morning overview, the district page and the explanation of a day."""

from __future__ import annotations

from datetime import date, datetime, timedelta
from typing import Annotated

from fastapi import APIRouter, Form, HTTPException, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from fastapi.templating import Jinja2Templates

from server.readmodels.area_tiers import above_district, region_tiers
from server.readmodels.cache import BoundedCache
from server.readmodels.capacity_pages import WARD_LOS_MEDIAN, area_capacity, district_forecast
from server.readmodels.district_marks import district_marks
from server.readmodels.dossier import district_dossier, explanation_page
from server.readmodels.morning import MorningOverview, morning_overview
from server.readmodels.region_breaks import is_above_districts, region_breaks
from server.services.feeds import load_catalogue
from server.services.forecast_record import record_lines
from server.services.phase_indicators import district_phase
from server.services.testing_reviews import TestingReviewError, review_testing_change
from web.charts import (
    add_marks,
    admissions_fan_figure,
    capacity_fan_figure,
    counts_figure,
    criterion_figure,
    figure_json,
    nowcast_figure,
    timeline_figure,
)
from web.deps import CsrfDep, PageNumber, RecordEventDep, SessionDep, SettingsDep, StaffDep
from web.mapsvg import svg_map
from web.templating import render

router = APIRouter(tags=["staff"])

#: Days before the explained day whose events and breaks the briefing can include.
EFFECTS_DAYS = 120


@router.get("/", response_class=HTMLResponse)
def home(
    request: Request, session: SessionDep, settings: SettingsDep, user: StaffDep,
    sort: str = "pending", q: str = "", tier: str = "", pending: str = "",
    page: PageNumber = 1,
) -> Response:
    """Every district: official and recommended tier, signals, indicators; feeds; changes."""
    tier_filter = int(tier) if tier.strip().isascii() and tier.strip().isdigit() else None
    view = morning_overview(session=session, sort=sort, query=q, tier=tier_filter,
                            pending_only=pending == "true", page=page,
                            catalogue=load_catalogue(settings), time_zone=settings.time_zone)
    key = f"staff|{view.ruleset}|{view.data_cutoff}|{len(view.every)}"
    shapes = request.app.state.maps.get_or_build(
        key, lambda: svg_map((x.code, x.geometry) for x in view.every))
    return render(request, "staff/home.html", {
        "view": view, "map": shapes, "by_code": {line.code: line for line in view.every},
        "sort": sort, "q": q, "tier": tier_filter, "pending_only": pending == "true",
        "data_on_hand": _data_on_hand_html(request, view),
    })


def _data_on_hand_html(request: Request, view: MorningOverview) -> str:
    """The "Data on hand" section, rendered once per (newest vintage, language) and worker by
    the autoescaping environment; home.html inserts it as markup (``|safe``)."""
    state = request.app.state
    cache: BoundedCache[tuple[object, ...], str] = state.staff_fragments
    lang = getattr(request.state, "lang", "en")
    templates: Jinja2Templates = state.templates

    def build() -> str:
        template = templates.get_template("staff/_data_on_hand.html")
        return template.render(oh=view.data_on_hand, measures=view.measures, lang=lang)

    return cache.get_or_build(("data_on_hand", view.data_on_hand_key, lang), build)


@router.get("/district/{code}", response_class=HTMLResponse)
def district(
    request: Request, code: str, session: SessionDep, user: StaffDep,
    start: date | None = None, end: date | None = None, policy: str = "",
) -> Response:
    """Charts per indicator with thresholds and bands, the tier timeline, recent revisions, under
    one active policy (``?policy=NAME``, default the lead policy; 404 for one not active).
    For an area's or the county's code: its summed cases and admissions with the breaks of
    every stream, their agreement and its events (:func:`region_page`)."""
    if is_above_districts(session=session, code=code):
        return region_page(request, session, code, start, end)
    dossier = district_dossier(session=session, code=code, start=start, end=end,
                               policy=policy.strip() or None)
    now = next((t for t in reversed(dossier.official) if t is not None), None)
    if now is None and dossier.recommended:
        now = dossier.recommended[-1]
    marks = district_marks(session=session, code=dossier.code, start=dossier.start,
                           end=dossier.end)

    def marked(fig: object) -> str:
        return figure_json(add_marks(fig, marks, dossier.start, dossier.end))

    charts = [marked(criterion_figure(c, dossier.tier_names, now)) for c in dossier.criteria]
    forecast = district_forecast(session=session, code=code)
    return render(request, "staff/district.html", {
        "d": dossier, "charts": charts, "timeline": marked(timeline_figure(dossier)),
        "marks": marks,
        "nowcast": figure_json(nowcast_figure(dossier.nowcast)) if dossier.nowcast else None,
        "phase": district_phase(session=session, code=dossier.code, end=dossier.last_day),
        "forecast": forecast,
        "forecast_charts": [figure_json(admissions_fan_figure(f)) for f in forecast.fans]
        if forecast else [],
        "above": above_district(session=session, code=dossier.code),
    })


def region_page(request: Request, session: SessionDep, code: str, start: date | None,
                end: date | None) -> Response:
    """The page of an area or the county (:mod:`server.readmodels.region_breaks`)."""
    r = region_breaks(session=session, code=code, start=start, end=end)

    def marked(fig: object) -> str:
        return figure_json(add_marks(fig, r.marks, r.start, r.end))

    charts = [marked(counts_figure(r.dates, r.cases, "Cases (sum of the districts)"))]
    if r.admissions is not None:
        charts.append(marked(counts_figure(r.dates, r.admissions,
                                           "Hospital admissions (sum of the districts)")))
    return render(request, "staff/region.html", {
        "r": r, "marks": r.marks, "charts": charts,
        "tiers": region_tiers(session=session, code=r.code),
    })


@router.post("/district/{code}/testing-review", response_model=None)
def testing_review(
    code: str, session: SessionDep, settings: SettingsDep, user: RecordEventDep, _csrf: CsrfDep,
    change_day: Annotated[str, Form()], verdict: Annotated[str, Form()],
    note: Annotated[str, Form()] = "",
) -> Response:
    """Confirm or dismiss a detected testing change (audit-logged); back to the district."""
    try:
        day = date.fromisoformat(change_day.strip())
        review_testing_change(session=session, user=user.name, region=code, change_day=day,
                              verdict=verdict, note=note, time_zone=settings.time_zone)
    except ValueError as exc:  # TestingReviewError or a day that is not YYYY-MM-DD
        detail = str(exc) if isinstance(exc, TestingReviewError) else (
            f"change_day: {change_day!r} is not an ISO date (YYYY-MM-DD)")
        raise HTTPException(status_code=422, detail=detail) from None
    return RedirectResponse(f"/staff/district/{code}#marks-h", status_code=303)


@router.get("/areas/{code}/capacity", response_class=HTMLResponse)
def capacity(request: Request, code: str, session: SessionDep, user: StaffDep,
             beds: str = "icu") -> Response:
    """The area's own tiers (policies set at area level); ICU beds (or, with ``?beds=ward``,
    general beds) in use against staffed beds, each scenario's forecast fan and the days until
    the configured share of staffed beds."""
    area = area_capacity(session=session, code=code, beds=beds)
    return render(request, "staff/capacity.html", {
        "a": area, "charts": [figure_json(capacity_fan_figure(area, f)) for f in area.fans],
        "record": record_lines(session=session, region=area.code),
        "ward_los_median": WARD_LOS_MEDIAN,
        "tiers": region_tiers(session=session, code=area.code),
    })


@router.get("/district/{code}/explain", response_class=HTMLResponse)
def explain(
    request: Request, code: str, session: SessionDep, settings: SettingsDep, user: StaffDep,
    day: date | None = None, as_of: datetime | None = None, policy: str = "",
    effects: str = "",
) -> Response:
    """Why the district has its recommended tier on a day: a printable one-page briefing.

    The assessment made for the day from the data as they were then (``as_of``: the one in
    force at that data cutoff), with what later data revised listed apart. ``effects=1``
    adds the measures and their effects: the events of the district, its area and the county
    in the :data:`EFFECTS_DAYS` days up to the day, with their before/after estimates, and
    the breaks in cases with the agreement of admissions and wastewater (newest data).
    """
    page = explanation_page(session=session, code=code, day=day, as_of=as_of,
                            policy=policy.strip() or None)
    marks = None
    if effects.strip() == "1":
        marks = district_marks(session=session, code=page.code,
                               start=page.day - timedelta(days=EFFECTS_DAYS), end=page.day)
    return render(request, "staff/explain.html", {
        "e": page, "zone": settings.time_zone, "marks": marks, "effects_days": EFFECTS_DAYS,
    })
