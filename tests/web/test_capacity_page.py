"""The area capacity page and the district page's forecast panel, on the demo."""

from __future__ import annotations

import json
import re

from fastapi.testclient import TestClient

from tests.web.conftest import ROLE_USER, login


def _figures(html: str) -> list[dict]:  # type: ignore[type-arg]
    return [json.loads(m.replace("&#34;", '"').replace("&quot;", '"').replace("&amp;", "&")
                       .replace("&lt;", "<").replace("&gt;", ">").replace("&#39;", "'"))
            for m in re.findall(r'data-figure="([^"]*)"', html)]


def test_area_capacity_page_shows_each_scenarios_fan_against_capacity(
    demo_app_client: TestClient,
) -> None:
    assert login(demo_app_client, ROLE_USER["analyst"]) == 303
    page = demo_app_client.get("/staff/areas/R1/capacity")
    assert page.status_code == 200
    html = page.text
    assert "Capacity of Upper Corven" in html
    figures = _figures(html)
    assert len(figures) == 3  # one per scenario of the demo policy
    titles = [f["layout"]["title"]["text"] for f in figures]
    assert titles == ["if the trend continues", "if it levels off within 7 days",
                      "if admissions halve within 14 days"]
    names = {t.get("name") for t in figures[0]["data"]}
    assert {"beds in use", "90% band", "50% band", "median", "staffed beds",
            "85% of staffed beds"} <= names
    # the table alternative: 21 forecast days per scenario, and the days-to-share table
    assert html.count("as a table") >= 4
    assert "Days until 85% of staffed beds" in html
    assert "Record of past forecasts" in html


def test_area_capacity_page_of_an_unknown_area_is_404(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, ROLE_USER["analyst"]) == 303
    assert demo_app_client.get("/staff/areas/NOPE/capacity").status_code == 404


def test_district_page_gains_the_forecast_panel(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, ROLE_USER["analyst"]) == 303
    html = demo_app_client.get("/staff/district/D06").text
    assert "Forecast: hospital admissions and ICU capacity" in html
    assert 'href="/staff/areas/R2/capacity"' in html
    assert "Days until 85% of staffed ICU beds in Astrel Downs" in html


def test_capacity_page_in_german(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, ROLE_USER["analyst"]) == 303
    html = demo_app_client.get("/staff/areas/R1/capacity?lang=de").text
    assert "Kapazität von Upper Corven" in html


def test_area_capacity_page_of_general_beds(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, ROLE_USER["analyst"]) == 303
    icu = demo_app_client.get("/staff/areas/R1/capacity").text
    assert 'href="/staff/areas/R1/capacity?beds=ward"' in icu
    page = demo_app_client.get("/staff/areas/R1/capacity?beds=ward")
    assert page.status_code == 200
    html = page.text
    assert "General beds of Upper Corven" in html
    assert 'href="/staff/areas/R1/capacity"' in html
    figures = _figures(html)
    assert len(figures) == 3  # one fan per scenario, against staffed general beds
    names = {t.get("name") for t in figures[0]["data"]}
    assert {"beds in use", "90% band", "staffed beds", "85% of staffed beds"} <= names
    assert "Days until 85% of staffed beds" in html
    assert "not kept in the record yet" in html
    assert demo_app_client.get("/staff/areas/R1/capacity?beds=maternity").status_code == 404
    german = demo_app_client.get("/staff/areas/R1/capacity?beds=ward&lang=de").text
    assert "Normalbetten von Upper Corven" in german
