"""Measures and effects page: each published tier change with its estimate or "too early to
tell", the chart with its table, and the form to record an event (analysts and up)."""

from __future__ import annotations

import html
import re
from datetime import UTC, date, datetime

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from server.store.models import AuditEntry, Decision, RecordedEvent, Region
from tests.web.conftest import csrf_of, login

PERIOD = {"start": "2026-08-01", "end": "2026-11-30"}


@pytest.fixture(scope="module")
def client(demo_app_client: TestClient) -> TestClient:
    """The demo with three published decisions for D01: a first tier and two changes."""
    now = datetime(2026, 11, 30, 9, tzinfo=UTC)
    with demo_app_client.app.state.database.transaction() as s:  # type: ignore[attr-defined]
        region = s.scalar(select(Region).where(Region.code == "D01"))
        assert region is not None
        for day, tier in ((date(2026, 8, 1), 0), (date(2026, 10, 1), 1),
                          (date(2026, 11, 25), 2)):
            s.add(Decision(region_id=region.id, effective_date=day, tier=tier,
                           kind="confirmed", reason="invented", decided_at=now,
                           published_at=now, policy="county-demo"))
    return demo_app_client


def _rows(text: str) -> list[str]:
    return re.findall(r'<tr data-status="[a-z_]+">.*?</tr>', text, flags=re.S)


def test_page_lists_each_tier_change_with_effect_or_too_early(client: TestClient) -> None:
    assert login(client, "vic.viewer") == 303
    page = client.get("/staff/effects", params=PERIOD)
    assert page.status_code == 200
    rows = _rows(page.text)
    assert len(rows) == 2  # the first publication is no change
    assert 'data-status="ready"' in rows[0] and "2026-10-01" in rows[0]
    assert re.search(r"[+-]0\.\d{3} <small>\([+-]0\.\d{3}", rows[0])  # change with its interval
    # Tier change on Nov 25: after window ends 7 + 7 + 14 - 1 days later, plus 3 settle days.
    assert "Too early to tell; can say from 2026-12-25." in html.unescape(rows[1])
    assert 'data-figure="' in page.text  # the small multiples, drawn from the ready event
    assert 'action="/staff/effects" class="login"' not in page.text  # viewers cannot record


def test_viewer_cannot_post_an_event(client: TestClient) -> None:
    assert login(client, "vic.viewer") == 303
    csrf = csrf_of(client.get("/staff/").text)
    answer = client.post("/staff/effects", data={
        "csrf": csrf, "region": "C0", "day": "2026-09-01", "kind": "other", "note": "x"})
    assert answer.status_code == 403


def test_analyst_records_a_county_event(client: TestClient) -> None:
    assert login(client, "ada.analyst") == 303
    page = client.get("/staff/effects", params=PERIOD)
    county = re.search(r'<option value="([^"]+)">[^<]*</option>', page.text)
    assert county is not None
    answer = client.post("/staff/effects", data={
        "csrf": csrf_of(page.text), "region": county.group(1), "day": "2026-09-15",
        "kind": "school_holidays", "note": "Invented autumn break", **PERIOD})
    assert answer.status_code == 200
    assert "The event was recorded." in answer.text
    assert "Invented autumn break" in answer.text
    assert len(_rows(answer.text)) == 3
    with client.app.state.database.transaction() as s:  # type: ignore[attr-defined]
        assert s.scalar(select(RecordedEvent).where(RecordedEvent.note.like("Invented%")))
        assert s.scalar(select(AuditEntry).where(AuditEntry.action == "record_event"))


@pytest.mark.parametrize("params,field", [
    ({"start": "2026-13-01"}, "start"), ({"window": "3"}, "window"),
    ({"start": "2026-11-01", "end": "2026-10-01"}, "end")], ids=["date", "window", "order"])
def test_bad_query_answers_422_naming_the_field(client: TestClient, params: dict[str, str],
                                                field: str) -> None:
    assert login(client, "vic.viewer") == 303
    answer = client.get("/staff/effects", params=params)
    assert answer.status_code == 422
    assert field in answer.text


def test_page_in_german(client: TestClient) -> None:
    assert login(client, "vic.viewer") == 303
    page = client.get("/staff/effects", params={**PERIOD, "lang": "de"})
    assert "Maßnahmen und ihre Wirkung" in page.text
    assert "Zu früh für eine Aussage" in html.unescape(page.text)


def test_each_break_in_the_windows_says_whether_admissions_and_wastewater_agree(
        client: TestClient) -> None:
    assert login(client, "vic.viewer") == 303
    page = client.get("/staff/effects", params=PERIOD)
    rows = _rows(page.text)
    notes = [re.findall(r"<small data-agreement>\((.*?)\)</small>", r, flags=re.S) for r in rows]
    dates = [re.findall(r"(\d{4}-\d{2}-\d{2}) <small data-agreement>", r) for r in rows]
    assert [len(n) for n in notes] == [len(d) for d in dates]
    assert sum(len(n) for n in notes) >= 1, notes  # the demo has breaks in these windows
    for note in (n for ns in notes for n in ns):
        assert "admissions" in note and "wastewater" in note
    assert "after allowing for its delay (admissions +3 days, wastewater -4 days" in page.text


def test_stream_delays_and_tolerance_come_from_the_query(client: TestClient) -> None:
    assert login(client, "vic.viewer") == 303
    page = client.get("/staff/effects", params={**PERIOD, "admissions_delay": "5",
                                                "wastewater_delay": "-6", "tolerance": "3"})
    assert page.status_code == 200
    assert "(admissions +5 days, wastewater -6 days against cases)" in page.text
    assert 'name="tolerance" min="0" max="28" value="3"' in page.text
    bad = client.get("/staff/effects", params={**PERIOD, "wastewater_delay": "40"})
    assert bad.status_code == 422 and "wastewater_delay" in bad.text
    bad = client.get("/staff/effects", params={**PERIOD, "admissions_delay": "soon"})
    assert bad.status_code == 422 and "admissions_delay" in bad.text


def test_page_links_the_pages_of_the_county_and_its_areas(client: TestClient) -> None:
    # the regions above the districts (read from the store, not the page) each get a link to
    # the page of their summed counts' breaks; no district or plant does
    assert login(client, "vic.viewer") == 303
    text = client.get("/staff/effects", params=PERIOD).text
    found = re.search(r"<p data-summed-regions>(.*?)</p>", text, flags=re.S)
    assert found is not None
    linked = re.findall(r'href="/staff/district/([^"]+)"', found.group(1))
    with client.app.state.database.transaction() as s:  # type: ignore[attr-defined]
        regions = list(s.scalars(select(Region)))
    parents = {r.parent_id for r in regions if r.level == "district"}
    expected = {r.code for r in regions if r.id in parents}
    expected |= {r.code for r in regions if r.id in {p.parent_id for p in regions
                                                     if p.id in parents}}
    assert set(linked) == expected and "C0" in expected and len(expected) > 1
    for code in linked[:2]:
        assert client.get(f"/staff/district/{code}").status_code == 200
