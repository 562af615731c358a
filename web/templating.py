"""Jinja2 environment with autoescape and a few formatting filters."""

from __future__ import annotations

from datetime import date, datetime
from pathlib import Path

from fastapi.templating import Jinja2Templates

from server.config import Settings

TEMPLATES = Path(__file__).with_name("templates")


def _thousands(value: int | float) -> str:
    return f"{value:,.0f}".replace(",", "\u202f")


def _iso(value: date | datetime | None) -> str:
    if value is None:
        return "—"
    if isinstance(value, datetime):
        return value.strftime("%Y-%m-%d %H:%M UTC")
    return value.isoformat()


def make_templates(settings: Settings) -> Jinja2Templates:
    templates = Jinja2Templates(directory=TEMPLATES)
    env = templates.env
    env.autoescape = True
    env.filters["thousands"] = _thousands
    env.filters["iso"] = _iso
    env.globals["public_base_url"] = settings.public_base_url
    env.globals["demo_mode"] = settings.demo_mode
    return templates
