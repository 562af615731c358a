"""Public, read-only pages for residents (no login): published tiers only.

Every page and its JSON twin carries nothing staff-only; pages are cacheable (ETag and
Last-Modified from the publication stamp, see :mod:`web.caching`) and answer ``HEAD`` as well as
``GET`` (link checkers and uptime monitors ask with ``HEAD``). The routes are coroutines
that answer from the worker's caches; the stamp and a page are read from the database (in the
thread pool, each in its own transaction) only when the caches cannot answer.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Query, Request, Response
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse

from server.readmodels.pages import (
    public_district_page,
    public_map,
)
from web.caching import conditional, page_language, stamp_reader
from web.deps import DatabaseDep, SettingsDep
from web.i18n import LANGUAGES
from web.mapsvg import svg_map
from web.templating import render

router = APIRouter(tags=["public"])




@router.get("/", response_class=HTMLResponse)
async def index(request: Request, db: DatabaseDep, settings: SettingsDep) -> Response:
    """Map and list of every district with its published tier, and the cautions."""

    def build() -> Response:
        with db.transaction() as session:
            data = public_map(session=session, lang=page_language(request))
        shapes = svg_map((d.code, d.geometry) for d in data.districts)
        return render(request, "public/index.html", {"data": data, "map": shapes,
                                                     "by_code": {d.code: d for d in data.districts},
                                                     "threshold": settings.small_count_threshold})

    return await conditional(request, stamp_reader(db), build)


@router.get("/district/{code}", response_class=HTMLResponse)
async def district(request: Request, code: str, db: DatabaseDep, settings: SettingsDep) -> Response:
    """One district: its tier and what it means, since when, a weekly trend, the cautions."""

    def build() -> Response:
        with db.transaction() as session:
            page = public_district_page(session=session, code=code,
                                        threshold=settings.small_count_threshold,
                                        lang=page_language(request))
        top = max((w.rate for w in page.weeks if w.rate is not None), default=0.0)
        return render(request, "public/district.html", {"page": page, "top_rate": top})

    return await conditional(request, stamp_reader(db), build)


@router.get("/language")
def language(lang: str = Query(...), next: str = Query("/")) -> RedirectResponse:
    """Remember the chosen language in a cookie and go back."""
    target = next if next.startswith("/") and not next.startswith("//") else "/"
    response = RedirectResponse(target, status_code=303)
    if lang in LANGUAGES:
        response.set_cookie("tw_lang", lang, max_age=365 * 86400, samesite="lax", httponly=True)
    return response


def _policies_json(found: Any) -> list[dict[str, Any]]:
    """The published tiers of the other active policies (the lead's are the top-level keys)."""
    return [{"policy": t.policy, "tier": t.tier, "tier_name": t.tier_name,
             "meaning": t.public_text, "since": t.since.isoformat() if t.since else None,
             "area": t.area} for t in found]


def _district_json(d: Any) -> dict[str, Any]:
    return {
        "code": d.code, "name": d.name, "area": d.area, "tier": d.tier,
        "tier_name": d.tier_name, "since": d.since.isoformat() if d.since else None,
        **({"policies": _policies_json(d.policies)} if d.policies else {}),
    }


@router.get("/api/public/districts")
async def districts_json(request: Request, db: DatabaseDep) -> Response:
    """Every district with its published tier (JSON)."""

    def build() -> Response:
        with db.transaction() as session:
            data = public_map(session=session, lang=page_language(request))
        return JSONResponse([_district_json(d) for d in data.districts])

    return await conditional(request, stamp_reader(db), build)


@router.get("/api/public/districts/{code}")
async def district_json(
    request: Request, code: str, db: DatabaseDep, settings: SettingsDep
) -> Response:
    """One district's published tier and weekly figures, small counts suppressed (JSON).

    A week with ``"provisional": true`` still has days inside the reporting-delay window: its
    count and rate are the reports received so far and will rise as late reports arrive.
    """

    def build() -> Response:
        with db.transaction() as session:
            p = public_district_page(session=session, code=code,
                                     threshold=settings.small_count_threshold,
                                     lang=page_language(request))
        return JSONResponse({
            "code": p.code, "name": p.name, "area": p.area, "tier": p.tier,
            "tier_name": p.tier_name, "meaning": p.public_text,
            "since": p.since.isoformat() if p.since else None,
            "published_at": p.published_at.isoformat() if p.published_at else None,
            "data_until": p.data_until.isoformat() if p.data_until else None,
            "weeks": [{"week_end": w.week_end.isoformat(), "cases": w.count_text,
                       "rate_per_100k": None if w.rate is None else round(w.rate, 1),
                       "provisional": w.provisional}
                      for w in p.weeks],
            **({"policies": _policies_json(p.policies)} if p.policies else {}),
        })

    return await conditional(request, stamp_reader(db), build)


# HEAD answers the same as GET without the body (kept out of the OpenAPI schema, which would
# otherwise list every page twice under one operation id).
for _path, _endpoint in (("/", index), ("/district/{code}", district),
                         ("/api/public/districts", districts_json),
                         ("/api/public/districts/{code}", district_json)):
    router.add_api_route(_path, _endpoint, methods=["HEAD"], include_in_schema=False)
