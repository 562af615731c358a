"""Measures and their effects: events of a period with before/after estimates; record an event.

``GET /staff/effects?start=&end=`` (ISO dates; default the last 120 days of data) lists every
published tier change and every recorded event of the period (:mod:`server.services.event_effects`)
with a small-multiples chart and the table beside it; ``window``, ``delay``, ``transition``,
``lead`` and ``settle`` (days) override the estimate's windows; ``admissions_delay``,
``wastewater_delay`` (days against cases, negative when the stream leads) and ``tolerance``
the agreement of breaks between streams. ``POST /staff/effects``
records an event (analysts and up) and comes back to the page.
"""

from __future__ import annotations

import datetime as dt
from typing import Annotated
from urllib.parse import urlencode

from fastapi import APIRouter, Form, HTTPException, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from server.services.event_effects import EffectOptions, EventError, effects_page, record_event
from server.services.stream_breaks import StreamOptionError, StreamOptions
from web.charts import effects_figure, figure_json
from web.deps import CsrfDep, RecordEventDep, SessionDep, StaffDep
from web.templating import render

router = APIRouter(tags=["staff"])

DEFAULT_DAYS = 120


def _date(field: str, text: str) -> dt.date:
    try:
        return dt.date.fromisoformat(text.strip())
    except ValueError:
        raise HTTPException(status_code=422,
                            detail=f"{field}: {text!r} is not an ISO date (YYYY-MM-DD)") from None


def _days(field: str, text: str, default: int) -> int:
    if not text.strip():
        return default
    if not text.strip().isdigit() or len(text.strip()) > 3:
        raise HTTPException(status_code=422, detail=f"{field}: {text!r} is not a number of days")
    return int(text)


def _signed_days(field: str, text: str, default: int) -> int:
    value = text.strip()
    if not value:
        return default
    digits = value[1:] if value[:1] in "+-" else value
    if not digits.isdigit() or len(digits) > 3:
        raise HTTPException(status_code=422, detail=f"{field}: {text!r} is not a number of days")
    return int(value)


@router.get("/effects", response_class=HTMLResponse)
def effects(
    request: Request, session: SessionDep, user: StaffDep, start: str = "", end: str = "",
    window: str = "", delay: str = "", transition: str = "", lead: str = "", settle: str = "",
    done: str = "", admissions_delay: str = "", wastewater_delay: str = "", tolerance: str = "",
) -> Response:
    """The events of the period with their estimates, the chart and the form."""
    today = dt.date.today()
    last = _date("end", end) if end.strip() else today
    first = _date("start", start) if start.strip() else last - dt.timedelta(days=DEFAULT_DAYS)
    base = EffectOptions()
    try:
        options = EffectOptions(
            window=_days("window", window, base.window), delay=_days("delay", delay, base.delay),
            transition=_days("transition", transition, base.transition),
            lead=_days("lead", lead, base.lead), settle=_days("settle", settle, base.settle))
        base_streams = StreamOptions()
        streams = StreamOptions(
            admissions_delay=_signed_days("admissions_delay", admissions_delay,
                                          base_streams.admissions_delay),
            wastewater_delay=_signed_days("wastewater_delay", wastewater_delay,
                                          base_streams.wastewater_delay),
            tolerance=_days("tolerance", tolerance, base_streams.tolerance))
        page = effects_page(session=session, start=first, end=last, options=options,
                            streams=streams)
    except (EventError, StreamOptionError) as exc:
        raise HTTPException(status_code=422, detail=str(exc)) from None
    fig = effects_figure(page.events)
    return render(request, "staff/effects.html", {
        "p": page, "chart": figure_json(fig) if fig is not None else None, "done": done == "1",
        "today": today,
    })


@router.post("/effects", response_model=None)
def record(
    request: Request, session: SessionDep, user: RecordEventDep, _csrf: CsrfDep,
    region: Annotated[str, Form()], day: Annotated[str, Form()], kind: Annotated[str, Form()],
    note: Annotated[str, Form()] = "", start: Annotated[str, Form()] = "",
    end: Annotated[str, Form()] = "",
) -> Response:
    """Record one event (audit-logged) and show the page again."""
    when = _date("day", day)
    try:
        record_event(session=session, user=user.name, region=region, day=when, kind=kind,
                     note=note)
    except EventError as exc:
        raise HTTPException(status_code=422, detail=str(exc)) from None
    query = {"done": "1", **({"start": start} if start else {}), **({"end": end} if end else {})}
    return RedirectResponse("/staff/effects?" + urlencode(query), status_code=303)
