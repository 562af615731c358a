"""Browser test of the area capacity page: every scenario's fan is drawn, under the CSP."""

from __future__ import annotations

import pytest

from tests.web.test_browser import browser, page, server, shot, sign_in  # noqa: F401 (fixtures)

pytestmark = [pytest.mark.browser, pytest.mark.slow]


def test_capacity_page_draws_each_scenarios_fan(server: str, page: object) -> None:  # noqa: F811
    sign_in(page, server, "ada.analyst")
    page.goto(server + "/staff/areas/R1/capacity")  # type: ignore[attr-defined]
    page.wait_for_selector(".chart[data-drawn]", timeout=15000)  # type: ignore[attr-defined]
    charts = page.locator(".chart")  # type: ignore[attr-defined]
    assert charts.count() == 3
    assert page.locator(".chart[data-drawn]").count() == 3  # type: ignore[attr-defined]
    # the demo seeds its past mornings' forecasts: the record is shown, not "no past forecasts"
    record = page.locator("section.forecast-record li")  # type: ignore[attr-defined]
    assert record.count() >= 4
    assert "share of ICU beds in use" in " ".join(record.all_inner_texts())
    assert not [e for e in page.csp_errors if "Content Security Policy" in e]  # type: ignore[attr-defined]
    shot(page, "20-staff-area-capacity")


def test_general_beds_page_draws_each_scenarios_fan(server: str, page: object) -> None:  # noqa: F811
    sign_in(page, server, "ada.analyst")
    page.goto(server + "/staff/areas/R1/capacity?beds=ward")  # type: ignore[attr-defined]
    page.wait_for_selector(".chart[data-drawn]", timeout=15000)  # type: ignore[attr-defined]
    assert page.locator(".chart").count() == 3  # type: ignore[attr-defined]
    assert page.locator(".chart[data-drawn]").count() == 3  # type: ignore[attr-defined]
    assert not [e for e in page.csp_errors if "Content Security Policy" in e]  # type: ignore[attr-defined]
