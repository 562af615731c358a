"""The explanation of a past day shows the assessment made for it, from the data as they were
then, from one record (issue 11): headline, sentence and table agree; what later data revised is
listed apart under "Revised since". Review cards explain the day the recommendation changed.

All on the invented demo county (``demo_seed``); the revision is an invented correction file.
"""

from __future__ import annotations

import html
import re
import sqlite3
from collections.abc import Iterator
from datetime import date, timedelta
from pathlib import Path

import pandas as pd
import pytest
from fastapi.testclient import TestClient

from server.services.evaluation import evaluate_if_behind, newest_cutoff
from server.store.vintages import append_vintage
from tests.web.conftest import DEMO_END, copy_demo, csrf_of, login, settings_for
from web.app import create_app


def _raise_of(demo_file: Path) -> tuple[str, date]:
    """A district and the day a raise of its recommendation took effect in the demo, at least
    three weeks before its end (so a correction of the two weeks before has room)."""
    with sqlite3.connect(demo_file) as db:
        row = db.execute(
            "select r.code, a.ref_date from assessment a join region r on r.id = a.region_id "
            "where a.recommended_tier > a.previous_tier and a.previous_tier >= 0 "
            "and a.ref_date <= ? order by a.ref_date desc, r.code limit 1",
            ((DEMO_END - timedelta(days=21)).isoformat(),)).fetchone()
    assert row is not None, "the demo raises no district"
    return row[0], date.fromisoformat(row[1])


@pytest.fixture()
def own_client(demo_file: Path, tmp_path: Path) -> Iterator[TestClient]:
    """A viewer's client on this test's own copy of the demo (it writes a revision)."""
    path = copy_demo(demo_file, tmp_path / "demo.db")
    with TestClient(create_app(settings_for(path))) as client:
        login(client, "vic.viewer")
        yield client


def _between(text: str, start: str, end: str) -> str:
    head = text.index(start)
    return text[head:text.index(end, head)]


def _sentence(page: str) -> str:
    found = re.search(r'<p class="sentence">(.*?)</p>', page, re.S)
    assert found is not None, "no sentence on the page"
    return html.unescape(found.group(1))


def _table(page: str) -> list[tuple[str, str, str]]:
    """(label, value, interval) of each row of the criteria table (a row whose figure is the
    area's carries a note under its label)."""
    table = _between(page, '<table class="grid compact explain">', "</table>")
    return [tuple(html.unescape(x) for x in row) for row in re.findall(
        r'<tr><th scope="row">([^<]+)(?:<br><small class="area-figure">[^<]*</small>)?</th>'
        r'<td class="num">([^<]+)</td><td class="num">([^<]+)</td>', table)]


def _agrees(page: str) -> int:
    """Check that every value the sentence quotes is the table's; returns how many it quotes.

    The sentence writes "<label> <number>[%] [(<lower>–<upper>)]"; the table's value cell starts
    with the same number and its interval cell is "<lower>–<upper>". The headline's tier is the
    tier the sentence names.
    """
    sentence = _sentence(page)
    tier = re.search(r"is recommended “([^”]+)” on", html.unescape(page))
    assert tier is not None
    if tier.group(1) != "insufficient data":
        assert f"{tier.group(1)} (" in sentence, (tier.group(1), sentence)
    quoted = 0
    for label, value, interval in _table(page):
        pattern = re.escape(label) + r" (n/a|-?[\d.]+)%?(?: \((-?[\d.]+)–(-?[\d.]+)\))?"
        for m in re.finditer(pattern, sentence):
            number = value.split(" ")[0].removesuffix("%")
            assert m.group(1) == number, (label, m.group(0), value, sentence)
            if m.group(2) is not None:
                assert f"{m.group(2)}–{m.group(3)}" == interval, (label, m.group(0), interval)
            quoted += 1
    return quoted


def _revise(client: TestClient, district: str, day: date) -> None:
    """An invented correction file for ``district``: two weeks before ``day`` re-reported with
    one case, one positive test and one admission a day; then the evaluation after ingestion."""
    db = client.app.state.database  # type: ignore[attr-defined]
    first = day - timedelta(days=14)
    measures = ("cases", "positives", "hosp_admissions")
    with db.transaction() as session:
        cutoff = newest_cutoff(session=session)
        assert cutoff is not None
        append_vintage(
            session=session, feed="correction", received_at=cutoff + timedelta(hours=2),
            checksum="invented-correction",
            rows=pd.DataFrame({
                "region": district, "measure": [m for m in measures for _ in range(14)],
                "ref_date": [first + timedelta(days=k) for _ in measures for k in range(14)],
                "value": 1.0,
            }),
        )
    run = evaluate_if_behind(db)
    assert run is not None and run.written > 0


def _main_part(page: str) -> str:
    """The page from the headline to the end of the briefing, without the run's cutoff (which
    names the newest evaluation) and without "Revised since"."""
    part = _between(page, "<h1>", '<p class="print-note">')
    part = re.sub(r'<section class="revised".*?</section>', "", part, flags=re.S)
    part = re.sub(r"<dt>Revised since</dt><dd>[^<]*</dd>", "", part)
    return re.sub(r"\s+", " ", part).strip()


def test_explanation_of_a_revised_day_keeps_the_values_known_then(
    own_client: TestClient, demo_file: Path,
) -> None:
    district, day = _raise_of(demo_file)
    url = f"/staff/district/{district}/explain?day={day}"
    before = own_client.get(url).text
    assert re.search(rf"Raised from [^:]+ on {day}", _sentence(before)), _sentence(before)
    assert _agrees(before) >= 3
    # the table holds the decision day's criteria, the ones the sentence quotes
    decided = day - timedelta(days=1)
    assert f"Criteria on {decided}, the day the change was decided</h2>" in before
    assert "<dt>Revised since</dt><dd>Nothing (newest evaluation: " in before
    incidence_then = _table(before)[0]
    _revise(own_client, district, day)
    after = own_client.get(url).text
    # headline, sentence, table and facts of the briefing: exactly as before
    assert _main_part(after) == _main_part(before)
    assert _agrees(after) >= 3
    # the revision, apart, in the printed part of the page
    revised = html.unescape(_between(after, '<section class="revised"', "</section>"))
    assert "noprint" not in revised.split(">", 1)[0]
    rows = re.findall(r'<tr><th scope="row">([^<]+)</th><td class="num">([^<]+)</td>'
                      r'<td class="num">([^<]+)</td><td>([^<]+)</td>', revised)
    by_label = {label: (old, new, level) for label, old, new, level in rows}
    label, value, interval = incidence_then
    old, new, _level = by_label[label]
    number, unit = value.split(" ", 1)
    assert old == f"{number} ({interval}) {unit}"  # the same formatter as the sentence
    assert new != old
    # the newest reading is one link away, and says it is a later reading
    link = re.search(r'href="([^"]+as_of=[^"]+)">Explanation with the newest data', after)
    assert link is not None
    newest = own_client.get(html.unescape(link.group(1))).text
    assert f"A later reading of {day}" in newest
    assert _agrees(newest) >= 1


@pytest.mark.slow
def test_explanation_pages_agree_with_themselves_on_every_demo_day(
    demo_app_client: TestClient, demo_file: Path,
) -> None:
    login(demo_app_client, "vic.viewer")
    with sqlite3.connect(demo_file) as db:
        days = db.execute(
            "select r.code, a.ref_date from assessment a join region r on r.id = a.region_id "
            "group by r.code, a.ref_date order by r.code, a.ref_date").fetchall()
    assert len(days) >= 14 * 150
    quoted = 0
    for code, day in days:
        page = demo_app_client.get(f"/staff/district/{code}/explain?day={day}")
        assert page.status_code == 200, (code, day)
        quoted += _agrees(page.text)
    assert quoted > len(days)  # most sentences quote several criteria


def test_review_card_names_the_day_of_the_change_and_opens_it(
    demo_app_client: TestClient, demo_file: Path,
) -> None:
    login(demo_app_client, "vic.viewer")
    page = demo_app_client.get("/staff/review").text
    card = _between(page, '<article class="pending-card"', "</article>")
    code = re.search(r'<a href="/staff/district/(\w+)">', card)
    assert code is not None
    with sqlite3.connect(demo_file) as db:  # the newest day the district's tier moved
        (moved,) = db.execute(
            "select max(a.ref_date) from assessment a join region r on r.id = a.region_id "
            "where r.code = ? and a.previous_tier != a.recommended_tier",
            (code.group(1),)).fetchone()
    held = (DEMO_END - date.fromisoformat(moved)).days + 1
    assert f"Recommended from {moved}: {held} days so far, up to {DEMO_END}." in card
    sentence = html.unescape(re.findall(r"<p>([^<]+)</p>", card)[0])
    # a move between tiers is told as one; a return from insufficient data reads "Stays at"
    assert (sentence.startswith(("Raised from ", "Lowered from ")) and f" on {moved}: " in sentence
            or sentence.startswith("Stays at "))
    link = re.search(r'<a href="([^"]+)">Full explanation of ([\d-]+)</a>', card)
    assert link is not None and link.group(2) == moved
    assert f"explain?day={moved}&amp;as_of=" in link.group(1)
    explained = demo_app_client.get(html.unescape(link.group(1))).text
    assert f"on {moved}</h1>" in explained
    assert _sentence(explained) == sentence


def test_decision_history_links_the_assessment_decided_on_as_it_was(
    own_client: TestClient,
) -> None:
    login(own_client, "otto.approver")
    page = own_client.get("/staff/review").text
    card = _between(page, '<article class="pending-card"', "</article>")
    action = re.search(r'action="(/staff/review/\d+)"', card)
    assert action is not None
    seen = dict(re.findall(r'name="(official_tier|official_decision)" value="([^"]*)"', card))
    answer = own_client.post(action.group(1), data={
        "csrf": csrf_of(page), "action": "confirm", "reason": "invented test reason", **seen},
        follow_redirects=False)
    assert answer.status_code == 303
    history = _between(own_client.get("/staff/review").text, 'id="hist-h"', "</section>")
    link = re.search(r'<a href="([^"]+)" title="The explanation of ([\d-]+) as it was', history)
    assert link is not None and link.group(2) == DEMO_END.isoformat()
    then = own_client.get(html.unescape(link.group(1))).text
    assert f"on {DEMO_END}</h1>" in then
    code = re.search(r'<a href="/staff/district/(\w+)">', card)
    assert code is not None
    _revise(own_client, code.group(1), DEMO_END)  # later data do not change what it answered
    again = _between(own_client.get("/staff/review").text, 'id="hist-h"', "</section>")
    assert link.group(1) in again
    assert _main_part(own_client.get(html.unescape(link.group(1))).text) == _main_part(then)
