"""The district page for an area's or the county's code: breaks of the cases and admissions
summed over its districts and of its main plant's wastewater, their agreement, its events."""

from __future__ import annotations

import html
import json
import re
from datetime import date

import numpy as np
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from server.services.stream_breaks import main_plants
from server.store.models import Region
from server.store.reads import read_dense
from tests.web.conftest import csrf_of, login


def _marks_text(text: str) -> str:
    found = re.search(r'<section aria-labelledby="marks-h">.*?</section>', text, flags=re.S)
    assert found is not None
    return html.unescape(re.sub(r"\s+", " ", found.group(0)))


def _districts_of(client: TestClient, code: str) -> list[tuple[str, str]]:
    """(code, name) of the districts under ``code``, read from the store (not the page)."""
    with client.app.state.database.transaction() as s:  # type: ignore[attr-defined]
        regions = {r.id: r for r in s.scalars(select(Region))}
        out = []
        for r in regions.values():
            node = regions.get(r.parent_id) if r.parent_id else None
            while node is not None and node.code != code:
                node = regions.get(node.parent_id) if node.parent_id else None
            if r.level == "district" and node is not None:
                out.append((r.code, r.name))
        return sorted(out)


def _main_plant(client: TestClient, code: str) -> str | None:
    with client.app.state.database.transaction() as s:  # type: ignore[attr-defined]
        regions = {r.id: r for r in s.scalars(select(Region))}
        return main_plants(s, [code], regions)[0]


@pytest.mark.parametrize(("code", "n_districts"), [("R1", 5), ("C0", 14)], ids=["area", "county"])
def test_a_region_page_lists_its_stream_breaks(demo_app_client: TestClient, code: str,
                                               n_districts: int) -> None:
    assert login(demo_app_client, "vic.viewer") == 303
    page = demo_app_client.get(f"/staff/district/{code}")
    assert page.status_code == 200
    breaks = re.findall(r'<tr data-mark="break">.*?</tr>', page.text, flags=re.S)
    streams = set(re.findall(r'<tr data-mark="(admissions|wastewater)">', page.text))
    # the demo's summed series of the area and the county both turn in Aug/Sep 2026
    assert breaks and streams == {"admissions", "wastewater"}, (len(breaks), streams)
    for row in breaks:
        found = re.search(r"<small data-agreement>(.*?)</small>", row, flags=re.S)
        assert found is not None
        assert "admissions" in found.group(1) and "wastewater" in found.group(1)
        assert "not searched" not in found.group(1)
    text = _marks_text(page.text)
    districts = _districts_of(demo_app_client, code)
    assert len(districts) == n_districts
    listed = ", ".join(f"{name} ({c})" for c, name in districts)
    assert f"the sums of {n_districts} districts: {listed};" in text
    plant = _main_plant(demo_app_client, code)
    assert plant is not None
    assert f"Wastewater is not summed over plants: it is that of plant {plant}," in text
    assert "Testing changes are screened per district" in text
    assert 'data-mark="testing"' not in page.text
    figures = [json.loads(html.unescape(f))
               for f in re.findall(r'data-figure="([^"]+)"', page.text)]
    assert len(figures) == 2  # cases and admissions
    labels = {a["text"] for a in figures[0]["layout"].get("annotations", [])}
    assert {"break", "admissions break", "wastewater break"} <= labels


def test_the_area_capacity_page_links_to_the_area_page(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "vic.viewer") == 303
    page = demo_app_client.get("/staff/areas/R1/capacity")
    assert page.status_code == 200
    assert '<a href="/staff/district/R1">' in page.text


def test_an_area_page_counts_are_the_sums_of_its_districts(demo_app_client: TestClient) -> None:
    # strict sum of counts up the region tree (DESIGN.md "Data model"; common practice, no
    # source): every day of the table equals the sum of the districts' stored cases
    assert login(demo_app_client, "vic.viewer") == 303
    page = demo_app_client.get("/staff/district/R2")
    assert page.status_code == 200
    table = re.search(r'<section aria-labelledby="counts-h">.*?</section>', page.text, flags=re.S)
    assert table is not None
    rows = re.findall(r'<tr><th scope="row">([0-9-]{10})</th><td class="num">([^<]*)</td>',
                      table.group(0))
    assert len(rows) == 14
    days = [date.fromisoformat(d) for d, _v in rows]
    codes = [c for c, _n in _districts_of(demo_app_client, "R2")]
    with demo_app_client.app.state.database.transaction() as s:  # type: ignore[attr-defined]
        cases = read_dense(session=s, measures=["cases"], start=days[0], end=days[-1],
                           regions=codes)["cases"]
    expected = cases.sum(axis=0)
    assert np.isfinite(expected).sum() >= 10  # most recent days reported by every district
    shown = [float(v.replace("\u202f", "").replace(",", "")) if v != "—" else np.nan
             for _d, v in rows]
    np.testing.assert_allclose(shown, expected)


def test_region_pages_list_their_and_the_county_events(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "ada.analyst") == 303
    csrf = csrf_of(demo_app_client.get("/staff/effects").text)
    for region, note in (("R1", "Invented area measure"), ("C0", "Invented county holidays")):
        answer = demo_app_client.post("/staff/effects", data={
            "csrf": csrf, "region": region, "day": "2026-10-01", "kind": "other", "note": note})
        assert answer.status_code == 200
    area, county, other = (_marks_text(demo_app_client.get(f"/staff/district/{c}").text)
                           for c in ("R1", "C0", "R2"))
    assert "Invented area measure" in area and "Invented county holidays" in area
    assert "Invented county holidays" in county and "Invented area measure" not in county
    assert "Invented county holidays" in other and "Invented area measure" not in other


def test_the_district_page_keeps_its_own_wording(demo_app_client: TestClient) -> None:
    # a regression guard: the district page names its plant and lists its testing changes as
    # before, with none of the region page's sentences
    assert login(demo_app_client, "vic.viewer") == 303
    page = demo_app_client.get("/staff/district/D01")
    text = _marks_text(page.text)
    assert f"Wastewater of plant {_main_plant(demo_app_client, 'D01')}." in text
    assert "data-summed" not in page.text and "not summed over plants" not in text
    assert 'data-mark="testing"' in page.text and "A dismissed testing change" in text


@pytest.mark.parametrize("code", ["WW1", "NOPE"], ids=["plant", "unknown"])
def test_a_code_that_is_no_district_nor_region_above_is_not_found(
        demo_app_client: TestClient, code: str) -> None:
    assert login(demo_app_client, "vic.viewer") == 303
    assert demo_app_client.get(f"/staff/district/{code}").status_code == 404


def test_a_region_page_refuses_a_period_ending_before_it_starts(
        demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "vic.viewer") == 303
    answer = demo_app_client.get("/staff/district/R1",
                                 params={"start": "2026-10-02", "end": "2026-10-01"})
    assert answer.status_code == 422
    assert "start 2026-10-02 is after end 2026-10-01" in answer.text


def test_the_district_page_links_to_its_areas_page(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "vic.viewer") == 303
    code, _name = _districts_of(demo_app_client, "R1")[0]
    page = demo_app_client.get(f"/staff/district/{code}")
    assert page.status_code == 200
    link = re.search(r'<a href="/staff/district/([^"]+)" data-area-link>', page.text)
    assert link is not None and link.group(1) == "R1"
    assert demo_app_client.get(f"/staff/district/{link.group(1)}").status_code == 200


@pytest.mark.parametrize("lang", ["en", "de"])
def test_the_marks_say_how_to_read_the_intervals(demo_app_client: TestClient, lang: str) -> None:
    # the sentence on the intervals renders with a plain per cent sign in both languages
    assert login(demo_app_client, "vic.viewer") == 303
    code, _name = _districts_of(demo_app_client, "R1")[0]
    text = _marks_text(demo_app_client.get(f"/staff/district/{code}",
                                           headers={"Accept-Language": lang}).text)
    expected = {"en": "the 95 % interval of its date", "de": "das 95-%-Intervall seines Datums"}
    assert expected[lang] in text
    assert "%%" not in text


def test_the_marks_are_german_on_a_german_page(demo_app_client: TestClient) -> None:
    # figures with a decimal comma in the marks table, chart labels of the marks in German
    assert login(demo_app_client, "vic.viewer") == 303
    code, _name = _districts_of(demo_app_client, "R1")[0]
    page = demo_app_client.get(f"/staff/district/{code}", headers={"Accept-Language": "de"})
    text = _marks_text(page.text)
    rows = re.findall(r'<tr data-mark="(?:break|admissions|wastewater|event)">.*?</tr>',
                      page.text, flags=re.S)
    assert rows
    shown = html.unescape(" ".join(rows))
    assert re.search(r"\d,\d{2}", shown) and not re.search(r"\d\.\d{2}", shown), shown[:300]
    assert "Intervall" in text
    labels = [a.get("text") for raw in re.findall(r'data-figure="([^"]*)"', page.text)
              for a in json.loads(html.unescape(raw)).get("layout", {}).get("annotations", [])]
    assert labels
    english = [w for w in ("tier change", "break", "testing change", "wastewater break")
               if w in labels]
    assert not english, english
    region = demo_app_client.get("/staff/district/R1", headers={"Accept-Language": "de"})
    assert "sum of the districts" not in html.unescape(region.text)
    assert "Summe der Bezirke" in html.unescape(region.text)
