"""Jinja2 environment with autoescape, message catalogs and a few formatting filters."""

from __future__ import annotations

import math
from datetime import UTC, date, datetime, tzinfo
from pathlib import Path
from typing import Any

import jinja2
from babel.dates import format_date
from babel.numbers import format_decimal, get_group_symbol
from fastapi import Request
from fastapi.responses import HTMLResponse
from fastapi.templating import Jinja2Templates

from server.config import Settings
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_rulesets
from web.chart_words import translate_figure
from web.charts import sparkline_points
from web.i18n import LANGUAGE_NAMES, LANGUAGES, current_language, load_catalogs
from web.palette import NO_TIER, tier_colours
from web.words import UNITS, measure_text, policy_words, translate_sentence

TEMPLATES = Path(__file__).with_name("templates")


# Numbers: the decimal sign of the page's language (209.9 / 209,9, Babel's CLDR data), digits
# grouped in threes by a narrow space in every language (ISO 80000-1, 7.3.1: never by a point or
# comma, so "1.234" cannot be misread across languages).
GROUP = "\u202f"


def format_number(value: float, decimals: int, lang: str | None = None) -> str:
    """``value`` with ``decimals`` places in the language of the request (or ``lang``)."""
    locale = lang or current_language.get()
    pattern = "#,##0" + ("." + "0" * decimals if decimals > 0 else "")
    text = format_decimal(value, format=pattern, locale=locale)
    return text.replace(get_group_symbol(locale), GROUP)


def local_time(value: date | datetime | None, zone: tzinfo = UTC, lang: str | None = None,
               *, written: bool = True) -> str:
    """A time stamp in the office's time zone ``zone`` with the zone's abbreviation (``2026-11-30
    06:30 CET``, in German ``30.11.2026 06:30 CET``); a date stays a date, None is a dash.

    The one way a page shows a time (the ``local`` filter; ``day`` and ``iso`` hand time stamps
    to it): stored times are UTC, the office reads its own clock. ``written=False`` keeps the
    ISO order of the day in every language (tables). Form fields and CSV files keep ISO 8601 in
    UTC with its offset (``datetime.isoformat()``), not this."""
    if value is None:
        return "—"
    locale = lang or current_language.get()
    german = written and locale == "de"
    if not isinstance(value, datetime):
        return format_date(value, "dd.MM.yyyy", locale=locale) if german else value.isoformat()
    here = (value if value.tzinfo else value.replace(tzinfo=UTC)).astimezone(zone)
    return f"{here:%d.%m.%Y %H:%M} {here.tzname()}" if german else (
        f"{here:%Y-%m-%d %H:%M} {here.tzname()}")


def format_day(value: date | datetime | None, lang: str | None = None,
               zone: tzinfo = UTC) -> str:
    """A day or time stamp written out in a sentence: ISO 8601 in English (the pages' choice,
    unambiguous), the German numeric form (``20.11.2026``, ``20.11.2026 06:30 CET``) in German;
    a time stamp in the office's time zone ``zone`` (:func:`local_time`). Tables, form fields
    and links keep :func:`_iso`."""
    return local_time(value, zone, lang)


def _thousands(value: int | float) -> str:
    return format_number(value, 0)


def _iso(value: date | datetime | None, zone: tzinfo = UTC) -> str:
    """A day as ISO 8601; a time stamp in the office's time zone in ISO order (table cells)."""
    return local_time(value, zone, "en", written=False)


def _number(value: float | None, decimals: int = 1) -> str:
    if value is None or not math.isfinite(value):
        return "—"
    return format_number(value, decimals)


def _tier_style(level: int | None, n_tiers: int) -> dict[str, str]:
    """Fill and text colour of a tier (grey for no tier)."""
    if level is None or level < 0 or n_tiers < 1 or level >= n_tiers:
        return {"fill": NO_TIER, "text": "#1b2430"}
    c = tier_colours(n_tiers)[level]
    return {"fill": c.fill, "text": c.text}


def make_templates(settings: Settings) -> Jinja2Templates:
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(TEMPLATES), autoescape=True,
        extensions=["jinja2.ext.i18n"],
    )
    templates = Jinja2Templates(env=env)
    env.autoescape = True
    catalogs = load_catalogs()
    env.install_gettext_callables(  # type: ignore[attr-defined]
        catalogs.gettext, catalogs.ngettext, newstyle=True
    )
    env.globals["catalogs"] = catalogs  # for texts built in Python (feeds, downloads)
    env.filters["thousands"] = _thousands
    zone = settings.zone  # every time a page shows is in the office's time zone
    env.filters["iso"] = lambda value: _iso(value, zone)
    env.filters["number"] = _number
    env.filters["day"] = lambda value: format_day(value, zone=zone)
    env.filters["local"] = lambda value: local_time(value, zone)
    env.filters["word"] = catalogs.gettext  # Python-built words, web/words.py
    env.filters["sentence"] = jinja2.pass_context(lambda ctx, text: translate_sentence(
        text, catalogs.gettext, current_language.get(), ctx.get("policy_words")))
    # why a feed row was rejected, its values quoted as sent (web/words.py)
    env.filters["reason"] = lambda text: translate_sentence(
        text, catalogs.gettext, current_language.get(), numbers=False)
    # a tier name or indicator label of the active policy in the page's language
    env.filters["pw"] = jinja2.pass_context(
        lambda ctx, text: (ctx.get("policy_words") or {}).get(text, text))
    # a measure of the store (``MeasureLabel`` or a name) in the page's language (web/words.py)
    env.filters["measure_label"] = lambda m: measure_text(
        getattr(m, "name", m), getattr(m, "label", m), catalogs.gettext, current_language.get())
    env.filters["measure_description"] = lambda m: measure_text(
        m.name, m.description or m.label, catalogs.gettext, current_language.get(), which=1)
    env.filters["unit"] = lambda u: catalogs.gettext(UNITS[u]) if u in UNITS else u
    # a chart's legend, titles and tick labels in the page's language (web/chart_words.py)
    env.filters["figure"] = jinja2.pass_context(lambda ctx, fig: translate_figure(
        fig, catalogs.gettext, current_language.get(), ctx.get("policy_words")))
    env.globals["sparkline"] = sparkline_points
    env.globals["tier_style"] = _tier_style
    env.globals["public_base_url"] = settings.public_base_url
    env.globals["demo_mode"] = settings.demo_mode
    env.globals["languages"] = [(code, LANGUAGE_NAMES[code]) for code in LANGUAGES]
    return templates


def _policy_words(request: Request, lang: str) -> dict[str, str]:
    if lang == "en" or not hasattr(request.app.state, "database"):
        return {}
    with request.app.state.database.transaction() as session:
        rows = active_rulesets(session=session)
        if not rows:
            return policy_words(None, lang)
        words: dict[str, str] = {}
        for row in reversed(rows):  # every active policy's words; the lead's win
            words.update(policy_words(parsed(row), lang))
        return words


def render(
    request: Request, name: str, context: dict[str, Any], *, status_code: int = 200
) -> HTMLResponse:
    """Render ``name`` with the signed-in user, CSRF token and language added to ``context``."""
    templates: Jinja2Templates = request.app.state.templates
    state = request.state
    ctx = {
        "user": getattr(state, "user", None),
        "csrf": getattr(state, "csrf", ""),
        "lang": getattr(state, "lang", "en"),
        "policy_words": _policy_words(request, getattr(state, "lang", "en")),
        **context,
    }
    return templates.TemplateResponse(request, name, ctx, status_code=status_code)
