"""Public downloads (CSV and JSON with a data dictionary) and Atom feeds of published tiers.

Everything here is as public as the pages: published tiers and suppressed weekly counts only.
Answers go through the same publication-stamp cache and validators as the pages
(:func:`web.caching.conditional`).
"""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Callable
from datetime import UTC, datetime
from typing import Any

from fastapi import APIRouter, HTTPException, Path, Request, Response
from fastapi.responses import HTMLResponse

from server.readmodels.pages import UnknownDistrictError
from server.readmodels.public_data import (
    DICTIONARY,
    DownloadTable,
    district_changes,
    published_changes,
    published_tier_table,
    tier_change_table,
    weekly_case_table,
)
from server.services.database import Database
from web.atom import ATOM_TYPE, AtomText, atom_feed
from web.caching import conditional, page_language, stamp_reader
from web.deps import DatabaseDep, SettingsDep
from web.templating import render

router = APIRouter(tags=["public"])

DOWNLOADS = ("tiers", "tier_changes", "weekly_cases")
_CODE = Path(pattern=r"^[A-Za-z0-9_-]{1,64}$")




def _gettext(request: Request) -> Callable[[str], str]:
    return request.app.state.templates.env.globals["catalogs"].gettext  # type: ignore[no-any-return]


def _table(name: str, db: Database, request: Request, threshold: int) -> DownloadTable:
    with db.transaction() as session:
        if name == "tiers":
            return published_tier_table(session=session, lang=page_language(request))
        if name == "tier_changes":
            return tier_change_table(session=session, lang=page_language(request))
        return weekly_case_table(session=session, threshold=threshold)


def _csv(table: DownloadTable) -> bytes:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\r\n")  # RFC 4180 line ends
    writer.writerow(table.columns)
    for row in table.rows:
        writer.writerow(["" if v is None else ("true" if v is True else "false" if v is False
                                                else v) for v in row])
    return out.getvalue().encode("utf-8")


def _json(table: DownloadTable) -> bytes:
    records = [dict(zip(table.columns, row, strict=True)) for row in table.rows]
    return json.dumps({"table": table.name, "fields": list(table.columns), "records": records},
                      ensure_ascii=False).encode("utf-8")


@router.get("/data", response_class=HTMLResponse)
async def data_page(request: Request, db: DatabaseDep, settings: SettingsDep) -> Response:
    """The downloads and feeds, with a data dictionary of every column."""

    def build() -> Response:
        with db.transaction() as session:
            changes = published_changes(session=session, lang=page_language(request))
        districts = sorted({(c.code, c.name) for c in changes}, key=lambda x: x[1])
        return render(request, "public/data.html", {
            "dictionary": DICTIONARY, "downloads": DOWNLOADS, "districts": districts,
            "threshold": settings.small_count_threshold,
        })

    return await conditional(request, stamp_reader(db), build)


@router.get("/data/dictionary.json")
def dictionary() -> dict[str, Any]:
    """The data dictionary: every download's columns with type and meaning."""
    return {name: [{"name": f.name, "type": f.type, "meaning": f.meaning} for f in fields]
            for name, fields in DICTIONARY.items()}


@router.get("/data/{name}.{fmt}")
async def download(
    request: Request, db: DatabaseDep, settings: SettingsDep,
    name: str = Path(pattern="^(tiers|tier_changes|weekly_cases)$"),
    fmt: str = Path(pattern="^(csv|json)$"),
) -> Response:
    """One download as CSV (RFC 4180, UTF-8) or JSON; columns as in the data dictionary."""

    def build() -> Response:
        table = _table(name, db, request, settings.small_count_threshold)
        if fmt == "csv":
            return Response(_csv(table), media_type="text/csv; charset=utf-8", headers={
                "content-disposition": f'attachment; filename="{name}.csv"'})
        return Response(_json(table), media_type="application/json")

    return await conditional(request, stamp_reader(db), build)


def _atom_text(request: Request, district: str | None) -> AtomText:
    _ = _gettext(request)
    title = (_("Alert tier of %(name)s") % {"name": district} if district
             else _("Alert tiers by district"))
    return AtomText(
        title=title, author=_("The health authority (published tiers)"),
        entry_title=_("{name}: {tier} (tier {number}) from {day}"),
        entry_summary=_("{name} is at {tier} (tier {number}) from {day}; before: {previous}. "
                        "Tiers are set by the health authority; figures are provisional."),
        entry_policy=_("Policy {policy}: "),
    )


@router.get("/feeds/tiers.atom")
async def county_feed(request: Request, db: DatabaseDep, settings: SettingsDep) -> Response:
    """Every change of a published tier in the county (Atom, RFC 4287)."""

    def build() -> Response:
        with db.transaction() as session:
            changes = published_changes(session=session, lang=page_language(request))
        body = atom_feed(changes[:200], base_url=settings.public_base_url,
                         self_path="/feeds/tiers.atom", page_path="/",
                         text=_atom_text(request, None), feed_key="county",
                         fallback_updated=datetime(2000, 1, 1, tzinfo=UTC))
        return Response(body, media_type=ATOM_TYPE)

    return await conditional(request, stamp_reader(db), build)


@router.get("/feeds/district/{code}.atom")
async def district_feed(
    request: Request, db: DatabaseDep, settings: SettingsDep, code: str = _CODE,
) -> Response:
    """Every change of one district's published tier (Atom, RFC 4287)."""

    def build() -> Response:
        with db.transaction() as session:
            try:
                data = district_changes(session=session, code=code, lang=page_language(request))
            except UnknownDistrictError as exc:
                raise HTTPException(status_code=404, detail=str(exc)) from exc
        body = atom_feed(data.changes, base_url=settings.public_base_url,
                         self_path=f"/feeds/district/{code}.atom", page_path=f"/district/{code}",
                         text=_atom_text(request, data.name), feed_key=f"district/{code}",
                         fallback_updated=datetime(2000, 1, 1, tzinfo=UTC))
        return Response(body, media_type=ATOM_TYPE)

    return await conditional(request, stamp_reader(db), build)


# HEAD answers like GET (kept out of the OpenAPI schema).
for _path, _endpoint in (("/data", data_page), ("/data/{name}.{fmt}", download),
                         ("/feeds/tiers.atom", county_feed),
                         ("/feeds/district/{code}.atom", district_feed)):
    router.add_api_route(_path, _endpoint, methods=["HEAD"], include_in_schema=False)
