"""Browser tests of the resident's view after a publication: what would change the tier, the
tier's measures, district names on the map, downloads and feeds; on a phone nothing is cut off.

Screenshots go to ``test-artifacts/`` like the other browser tests.
"""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from tests.web.test_browser import browser, server, shot, sign_in  # noqa: F401 (fixtures)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

PHONE = {"width": 390, "height": 844}


@pytest.fixture(scope="module")
def published(server: str, browser: object) -> Iterator[str]:  # noqa: F811
    """The demo after an approver published every district's first tier."""
    context = browser.new_context(viewport={"width": 1280, "height": 900})  # type: ignore[attr-defined]
    pg = context.new_page()
    sign_in(pg, server, "otto.approver")
    pg.goto(server + "/staff/review")
    pg.click("text=Publish all decisions")
    pg.wait_for_selector("p.notice")
    context.close()
    yield server


def test_public_district_on_a_phone_says_what_would_change_the_tier(
    published: str, browser: object,  # noqa: F811
) -> None:
    context = browser.new_context(viewport=PHONE, is_mobile=True)  # type: ignore[attr-defined]
    pg = context.new_page()
    pg.goto(published + "/district/D05")
    outlook = pg.locator("section.outlook")
    assert outlook.locator("h2").inner_text() == "What would change this tier"
    assert outlook.locator("ul.conditions li").count() >= 2
    assert pg.locator(".tier-rules ul.measures li").count() >= 1
    # Nothing is cut off: no sideways scroll, and every block fits the screen.
    assert pg.evaluate("document.documentElement.scrollWidth") <= PHONE["width"]
    too_wide = pg.evaluate(
        "[...document.querySelectorAll('main *')].filter(e => e.getBoundingClientRect().right"
        " > window.innerWidth + 1 && !e.closest('.scroll')).map(e => e.tagName + '.' +"
        " e.className)"
    )
    assert too_wide == []
    shot(pg, "20-public-district-outlook-phone")
    pg.goto(published + "/district/D05?lang=de")
    assert pg.locator("section.outlook h2").inner_text() == "Was diese Stufe ändern würde"
    shot(pg, "21-public-district-outlook-phone-de")
    pg.goto(published + "/")
    assert pg.evaluate("document.documentElement.scrollWidth") <= PHONE["width"]
    shot(pg, "22-public-map-phone")
    context.close()


def test_public_map_names_every_district(published: str, browser: object) -> None:  # noqa: F811
    context = browser.new_context(viewport={"width": 1280, "height": 900})  # type: ignore[attr-defined]
    pg = context.new_page()
    pg.goto(published + "/")
    names = pg.locator("figure.map text .map-name").evaluate_all("es => es.map(e => e.textContent)")
    rows = pg.locator("table.grid tbody th a").all_inner_texts()
    assert sorted(names) == sorted(rows) and len(names) == 14
    # Labels are legible: at least 10 px on screen at this width.
    size = pg.evaluate("Math.min(...[...document.querySelectorAll('.map-name')]"
                       ".map(e => e.getBoundingClientRect().height))")
    assert size >= 10
    shot(pg, "23-public-map-names")
    context.close()


def test_data_page_links_work(published: str, browser: object) -> None:  # noqa: F811
    context = browser.new_context(viewport={"width": 1280, "height": 900})  # type: ignore[attr-defined]
    pg = context.new_page()
    pg.goto(published + "/data")
    hrefs = pg.locator("main a").evaluate_all("as => as.map(a => a.getAttribute('href'))")
    assert "/feeds/tiers.atom" in hrefs and "/data/weekly_cases.csv" in hrefs
    for href in hrefs:
        answer = pg.request.get(published + href)
        assert answer.status == 200, href
    shot(pg, "24-public-data-page")
    context.close()
