"""Browser test of issue 16, item 6: three German staff pages as Chromium draws them.

Playwright drives Debian's Chromium against uvicorn on its own copy of the demo database, with
the demo's feed file and the demo office's time zone (Europe/Berlin). The overview, a district
page and an area's capacity page are opened in German; the charts must be drawn with German
legends and month names (plotly.js with the ``de`` locale of ``static/charts.js``), and no time
may be shown in UTC. Screenshots are saved under the test's tmp path (``german-*.png``).
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path

import pytest

from demo_seed.feeds import DEMO_FEEDS_FILE
from tests.web.conftest import copy_demo
from tests.web.test_browser import (  # noqa: F401 - fixtures used by name
    browser,
    page,
    serving,
    sign_in,
)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

# German month abbreviations that differ from the English ones (CLDR de, abbreviated months)
GERMAN_MONTHS = re.compile(r"\b(?:Mär|Mai|Okt|Dez)\b")


@pytest.fixture(scope="module")
def server(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    path = copy_demo(demo_file, tmp_path_factory.mktemp("browser-german") / "demo.db")
    with serving(path, TIERWISE_FEEDS_FILE=str(DEMO_FEEDS_FILE),
                 TIERWISE_TIME_ZONE="Europe/Berlin") as base:
        yield base


def _drawn_text(pg: object) -> str:
    pg.wait_for_selector("[data-figure][data-drawn='1'] .main-svg", timeout=20000)  # type: ignore[attr-defined]
    return str(pg.locator("main").inner_text())  # type: ignore[attr-defined]


def test_german_overview_district_and_capacity_pages(
    server: str, page, tmp_path: Path,  # type: ignore[no-untyped-def]  # noqa: F811
) -> None:
    sign_in(page, server, "vic.viewer")
    page.goto(server + "/staff/?lang=de")
    assert page.get_attribute("html", "lang") == "de"
    text = page.locator("main").inner_text()
    assert "Morgenübersicht" in text and "Geändert seit dem Vortag" in text
    assert re.search(r"\d{2}:\d{2} (?:CET|CEST)\b", text) and " UTC" not in text
    page.screenshot(path=str(tmp_path / "german-overview.png"), full_page=True)

    page.goto(server + "/staff/district/D13?lang=de")
    text = _drawn_text(page)
    assert "Stufe: amtlich und empfohlen" in text  # the timeline chart's title
    assert "Vorwarnung" in text and GERMAN_MONTHS.search(text)
    assert "recommended" not in text and "95% interval" not in text
    page.screenshot(path=str(tmp_path / "german-district.png"), full_page=True)

    page.goto(server + "/staff/areas/R1/capacity?lang=de")
    text = _drawn_text(page)
    assert "bei gleichem Trend" in text and "if the trend continues" not in text
    assert "Median" in text and "betreibbare Betten" in text and GERMAN_MONTHS.search(text)
    modebar = page.locator(".modebar-btn").first.get_attribute("data-title") or ""
    assert modebar and "Download" not in modebar
    page.screenshot(path=str(tmp_path / "german-capacity.png"), full_page=True)
    assert page.csp_errors == []
