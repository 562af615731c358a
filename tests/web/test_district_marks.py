"""District page: breaks, events and testing changes marked on the charts and listed under them
(the table alternative), and the form to confirm or dismiss a detected testing change."""

from __future__ import annotations

import html
import json
import re
from datetime import date, timedelta

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from demo_seed.storyline import build_calendar
from server.services.testing_reviews import dismissals
from server.store.models import AuditEntry, TestingChangeReview
from tests.web.conftest import DEMO_END, csrf_of, login

DEMO_DAYS = 150
#: the demo's true testing-policy change (test date), from its calendar
CHANGE = build_calendar(DEMO_END - timedelta(days=DEMO_DAYS - 1), DEMO_DAYS).testing_change


def _testing_rows(text: str) -> list[str]:
    return re.findall(r'<tr data-mark="testing">.*?</tr>', text, flags=re.S)


def _figures(text: str) -> list[dict]:  # type: ignore[type-arg]
    return [json.loads(html.unescape(f)) for f in re.findall(r'data-figure="([^"]+)"', text)]


def test_the_demo_testing_change_is_marked_and_listed(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "vic.viewer") == 303
    page = demo_app_client.get("/staff/district/D01")
    assert page.status_code == 200
    rows = _testing_rows(page.text)
    days = [date.fromisoformat(re.search(r'class="date">([0-9-]{10})', r).group(1))  # type: ignore[union-attr]
            for r in rows]
    assert any(abs((d - CHANGE).days) <= 3 for d in days), (days, CHANGE)
    assert "Tests after / before:" in rows[0]
    assert "/testing-review" not in page.text  # viewers cannot give a verdict
    figures = _figures(page.text)
    assert figures  # the timeline and a chart per criterion
    for fig in figures[:2]:
        labels = [a["text"] for a in fig["layout"].get("annotations", [])]
        assert "testing change" in labels
        lines = [s for s in fig["layout"]["shapes"] if s["line"]["dash"] == "dash"]
        assert {s["x0"][:10] for s in lines} == {d.isoformat() for d in days}


def test_an_analyst_dismisses_and_it_counts_from_that_day(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "ada.analyst") == 303
    page = demo_app_client.get("/staff/district/D01")
    row = _testing_rows(page.text)[0]
    day = re.search(r'name="change_day" value="([^"]+)"', row).group(1)  # type: ignore[union-attr]
    answer = demo_app_client.post("/staff/district/D01/testing-review", data={
        "csrf": csrf_of(page.text), "change_day": day, "verdict": "dismissed",
        "note": "Invented: a lab backlog, not a policy change"})
    assert answer.status_code == 200  # followed the redirect back to the page
    assert "Dismissed" in _testing_rows(answer.text)[0]
    assert "Invented: a lab backlog" in answer.text
    with demo_app_client.app.state.database.transaction() as s:  # type: ignore[attr-defined]
        review = s.scalar(select(TestingChangeReview))
        assert review is not None and review.verdict == "dismissed"
        assert s.scalar(select(AuditEntry).where(AuditEntry.action == "review_testing_change"))
        found = dismissals(session=s)
        assert [(c, d.isoformat()) for c, d, _on in found] == [("D01", day)]
        # as known: a run with an earlier cutoff does not see it
        assert dismissals(session=s, as_of=review.reviewed_at - timedelta(seconds=1)) == ()


@pytest.mark.parametrize(("data", "field"), [
    ({"verdict": "maybe", "note": "x"}, "verdict"),
    ({"verdict": "confirmed", "note": " "}, "note"),
    ({"verdict": "confirmed", "note": "x", "change_day": "03/02/2026"}, "change_day"),
])
def test_bad_verdicts_are_refused(demo_app_client: TestClient, data: dict[str, str],
                                  field: str) -> None:
    assert login(demo_app_client, "ada.analyst") == 303
    csrf = csrf_of(demo_app_client.get("/staff/").text)
    form = {"csrf": csrf, "change_day": CHANGE.isoformat(), **data}
    answer = demo_app_client.post("/staff/district/D01/testing-review", data=form)
    assert answer.status_code == 422
    assert field in answer.text


def test_a_viewer_cannot_give_a_verdict(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "vic.viewer") == 303
    csrf = csrf_of(demo_app_client.get("/staff/").text)
    answer = demo_app_client.post("/staff/district/D01/testing-review", data={
        "csrf": csrf, "change_day": CHANGE.isoformat(), "verdict": "dismissed", "note": "x"})
    assert answer.status_code == 403


def test_explanations_after_the_demo_change_name_it(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "vic.viewer") == 303
    page = demo_app_client.get("/staff/district/D01/explain",
                               params={"day": (CHANGE + timedelta(days=6)).isoformat()})
    assert page.status_code == 200
    text = html.unescape(page.text)
    found = re.search(r"Testing: tests rose (\d+)% from (\S+): part of the rise in cases "
                      r"reflects more testing\.", text)
    assert found is not None
    # the demo's negative tests step from 150 to 420 per 100 000 a day: tests more than double
    assert int(found.group(1)) > 100
    assert abs((date.fromisoformat(found.group(2)) - CHANGE).days) <= 3
    later = demo_app_client.get("/staff/district/D01/explain",
                                params={"day": (CHANGE + timedelta(days=30)).isoformat()})
    assert "Testing: tests" not in html.unescape(later.text)  # past the hold's 14 days


def test_admissions_and_wastewater_breaks_are_listed_beside_case_breaks(
        demo_app_client: TestClient) -> None:
    # every demo district has admissions and a plant: their breaks are searched and listed,
    # and each case break says whether each stream agrees
    assert login(demo_app_client, "vic.viewer") == 303
    page = demo_app_client.get("/staff/district/D01")
    assert page.status_code == 200
    breaks = re.findall(r'<tr data-mark="break">.*?</tr>', page.text, flags=re.S)
    streams = re.findall(r'<tr data-mark="(admissions|wastewater)">', page.text)
    assert breaks and streams, (len(breaks), streams)
    for row in breaks:
        found = re.search(r"<small data-agreement>(.*?)</small>", row, flags=re.S)
        assert found is not None
        assert "admissions" in found.group(1) and "wastewater" in found.group(1)
        assert "not searched" not in found.group(1)
    assert "Wastewater of plant" in page.text
    labels = {a["text"] for fig in _figures(page.text)[:1]
              for a in fig["layout"].get("annotations", [])}
    assert labels & {"admissions break", "wastewater break"}
