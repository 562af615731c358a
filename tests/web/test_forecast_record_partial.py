"""The forecast-record partial (staff/_forecast_record.html) in English and German, singular and
plural, rendered with the app's Jinja environment and catalogs."""

from __future__ import annotations

import re

import pytest

from server.config import Settings
from server.services.forecast_record import RecordLine
from web.i18n import current_language
from web.templating import make_templates


def _render(lang: str, lines: list[RecordLine]) -> str:
    env = make_templates(Settings(demo_mode=True)).env
    token = current_language.set(lang)
    try:
        html = env.get_template("staff/_forecast_record.html").render(forecast_record=lines)
    finally:
        current_language.reset(token)
    return re.sub(r"\s+", " ", html)


def _line(n: int, inside: int, ratio: float | None) -> RecordLine:
    return RecordLine(target="hosp_admissions", scenario="persistence", horizon=14,
                      forecasts=n, inside_90=inside, relative_wis=ratio)


@pytest.mark.parametrize(
    ("lang", "line", "text"),
    [
        ("en", _line(60, 52, 0.8), "Of the last 60 14-day forecasts of hospital admissions, 52 "
         "fell inside the 90 % band; 0.8 of the naive error."),
        ("en", _line(1, 1, None), "Of the last 1 14-day forecast of hospital admissions, 1 fell "
         "inside the 90 % band."),
        ("de", _line(60, 52, 0.8), "Krankenhausaufnahmen, letzte 60 14-Tage-Prognosen: 52 im "
         "90-%-Band; 0,8 des naiven Fehlers."),
        ("de", _line(1, 0, 1.3), "Krankenhausaufnahmen, letzte 1 14-Tage-Prognose: 0 im "
         "90-%-Band; 1,3 des naiven Fehlers."),
    ],
    ids=["en-plural", "en-singular", "de-plural", "de-singular"],
)
def test_forecast_record_sentence(lang: str, line: RecordLine, text: str) -> None:
    assert text in _render(lang, [line])


def test_forecast_record_partial_is_empty_without_lines() -> None:
    assert _render("en", []).strip() == ""
