"""Staff pages on a fresh demo copy per test: the review page (decisions across new data,
publishing nothing, tier names, the history), the overview's decided districts and the
explanation of a row kept from an earlier run."""

from __future__ import annotations

import re
import sqlite3
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from server.services.database import Database
from server.services.evaluation import evaluate_districts, newest_cutoff
from server.services.rulesets import active_ruleset
from server.store.models import Decision as DecisionRow
from server.store.models import Region
from tests.web.conftest import copy_demo, csrf_of, login, seen_fields, settings_for
from web.app import create_app

pytestmark = pytest.mark.slow
APPROVER = "otto.approver"  # invented demo account (demo_seed.seed)


@pytest.fixture()
def review_client(
    demo_file: Path, tmp_path: Path
) -> Iterator[tuple[TestClient, Path]]:
    """A client and the path of its own copy of the demo database (one per test)."""
    path = copy_demo(demo_file, tmp_path / "demo.db")
    with TestClient(create_app(settings_for(path))) as client:
        login(client, APPROVER)
        yield client, path


def _first_form(page: str) -> tuple[int, str]:
    """(assessment id, district name) of the first pending card."""
    found = re.search(r'<h3 id="p-(\d+)"><a href="/staff/district/\w+">([^<]+)</a>', page)
    assert found is not None, "no pending card"
    return int(found.group(1)), found.group(2)


def _stand_in(path: Path, current: int, tier_delta: int) -> int:
    """Make an earlier day's row of the same district stand for a form opened before new data.

    The row three days before the current one is given the current tier plus ``tier_delta``
    (a test-only edit of a stored row); its id is what the stale form posts.
    """
    with sqlite3.connect(path) as db:
        region, day, tier = db.execute(
            "select region_id, ref_date, recommended_tier from assessment where id = ?",
            (current,)).fetchone()
        (earlier,) = db.execute(
            "select id from assessment where region_id = ? and ref_date = date(?, '-3 day') "
            "and ruleset_id = (select ruleset_id from assessment where id = ?) "
            "order by data_cutoff desc limit 1", (region, day, current)).fetchone()
        db.execute("update assessment set recommended_tier = ? where id = ?",
                   (tier + tier_delta if tier + tier_delta >= 0 else tier + 1, earlier))
    return int(earlier)


def test_confirm_after_new_data_with_the_same_tier_goes_through(
    review_client: tuple[TestClient, Path],
) -> None:
    client, path = review_client
    page = client.get("/staff/review").text
    current, _name = _first_form(page)
    stale = _stand_in(path, current, 0)
    answer = client.post(f"/staff/review/{stale}", data={
        "csrf": csrf_of(page), "action": "confirm", "reason": "agreed",
        **seen_fields(page, current)}, follow_redirects=False)
    assert answer.status_code == 303
    after = client.get("/staff/review").text
    assert f'id="p-{current}"' not in after
    assert "1 decision not yet published" in after


def test_confirm_after_new_data_with_another_tier_keeps_the_reason(
    review_client: tuple[TestClient, Path],
) -> None:
    client, path = review_client
    page = client.get("/staff/review").text
    current, name = _first_form(page)
    stale = _stand_in(path, current, -1)
    reason = "checked with the lab <on the phone>"
    answer = client.post(f"/staff/review/{stale}", data={
        "csrf": csrf_of(page), "action": "confirm", "reason": reason,
        **seen_fields(page, current)}, follow_redirects=False)
    assert answer.status_code == 409
    assert "new data changed the recommendation" in answer.text
    assert "It now recommends <strong>" in answer.text
    textarea = re.search(rf'<textarea id="reason-{current}"[^>]*>([^<]*)</textarea>', answer.text)
    assert textarea is not None and textarea.group(1) == "checked with the lab &lt;on the phone&gt;"
    assert "0 decisions not yet published" in answer.text
    assert name in answer.text


def test_publish_with_nothing_to_publish_says_so(
    review_client: tuple[TestClient, Path],
) -> None:
    client, path = review_client
    page = client.get("/staff/review").text
    first = client.post("/staff/publish", data={"csrf": csrf_of(page)}, follow_redirects=False)
    assert first.headers["location"] == "/staff/review?published=1"
    page = client.get("/staff/review").text
    assert re.search(r'<button type="submit" class="primary" disabled[^>]*>Publish all', page)
    with sqlite3.connect(path) as db:
        (before,) = db.execute("select count(*) from audit").fetchone()
    answer = client.post("/staff/publish", data={"csrf": csrf_of(page)})
    assert "Nothing to publish" in answer.text
    assert "The public view now shows the new tiers" not in answer.text
    with sqlite3.connect(path) as db:
        (after,) = db.execute("select count(*) from audit").fetchone()
    assert after == before


def test_pending_card_names_both_tiers(review_client: tuple[TestClient, Path]) -> None:
    client, _path = review_client
    page = client.get("/staff/review").text
    title = re.search(r'<h3 id="p-\d+"><a [^>]+>[^<]+</a>: ([^<]+)</h3>', page)
    assert title is not None
    # the demo's ruleset names its tiers Baseline, Heightened, High, Severe (county.yaml)
    assert re.fullmatch(
        r"(no official tier|(Baseline|Heightened|High|Severe) \(\d\)) → "
        r"(Baseline|Heightened|High|Severe) \(\d\)|.* → insufficient data", title.group(1)
    ), title.group(1)


def _seed_history(path: Path, n: int) -> None:
    """``n`` invented published decisions, alternating D01 and D02 (invented districts)."""
    db = Database.from_settings(settings_for(path))
    try:
        with db.transaction() as session:
            ids = dict(session.execute(select(Region.code, Region.id)).all())
            start = datetime(2026, 6, 1, 8, 0, tzinfo=UTC)
            for k in range(n):
                at = start + timedelta(days=k)
                session.add(DecisionRow(
                    policy="county-demo", region_id=ids["D01" if k % 2 == 0 else "D02"],
                    assessment_id=None,
                    effective_date=at.date(), tier=k % 3, kind="overridden",
                    reason=f"invented decision {k}", decided_by=None, decided_at=at,
                    published_at=at,
                ))
    finally:
        db.dispose()


def test_history_shows_the_newest_30_with_a_link_to_all_and_a_district_filter(
    review_client: tuple[TestClient, Path],
) -> None:
    client, path = review_client
    _seed_history(path, 35)
    total, d01 = 35, 18  # D01 takes every other decision of _seed_history's 35
    rows = lambda text: text.split('id="hist-h"')[1].count("<tr><td>")  # noqa: E731
    page = client.get("/staff/review").text
    assert rows(page) == 30
    assert f'href="/staff/review?all=1#hist-h">Show all {total}</a>' in page
    assert rows(client.get("/staff/review?all=1").text) == total
    assert rows(client.get("/staff/review?all=1&region=D01").text) == d01
    history = page.split('id="hist-h"')[1]
    assert not re.search(r"<td>\d</td><td>(confirmed|overridden)", history), "bare tier number"


def _evaluate_later(path: Path, hours: int) -> None:
    """A new evaluation run ``hours`` after the newest cutoff on unchanged data."""
    db = Database.from_settings(settings_for(path))
    try:
        with db.transaction() as session:
            row = active_ruleset(session=session)
            cutoff = newest_cutoff(session=session)
            assert row is not None and cutoff is not None
            evaluate_districts(session=session, ruleset_row=row,
                               cutoff=cutoff + timedelta(hours=hours))
    finally:
        db.dispose()


def test_explanation_of_a_row_kept_from_an_earlier_run_names_both_cutoffs(
    review_client: tuple[TestClient, Path],
) -> None:
    client, path = review_client
    _evaluate_later(path, 5)
    text = client.get("/staff/district/D05/explain").text
    made = re.search(r"from the data received up to (\S+ \S+ UTC)", text)
    newest = re.search(r"Nothing \(newest evaluation: (\S+ \S+ UTC)\)", text)
    assert made is not None and newest is not None, "an unchanged run keeps the earlier row"
    assert made.group(1) != newest.group(1)


def test_overview_shows_a_decided_unpublished_district(
    review_client: tuple[TestClient, Path],
) -> None:
    client, _path = review_client
    page = client.get("/staff/review").text
    client.post("/staff/publish", data={"csrf": csrf_of(page)})
    page = client.get("/staff/review").text
    assert "Nothing awaits a decision." in page
    # override D01 to another tier than its published one: decided, not yet published
    with sqlite3.connect(_path) as db:
        (aid, tier) = db.execute(
            "select a.id, a.recommended_tier from decision d join assessment a on "
            "a.id = d.assessment_id join region r on r.id = d.region_id where r.code = 'D01'"
        ).fetchone()
        (decision, official) = db.execute(
            "select d.id, d.tier from decision d join region r on r.id = d.region_id "
            "where r.code = 'D01' order by d.effective_date desc, d.decided_at desc, d.id desc"
        ).fetchone()
    other = (tier + 1) % 3
    answer = client.post(f"/staff/review/{aid}", data={
        "csrf": csrf_of(page), "action": "override", "tier": str(other),
        "reason": "invented reason", "official_tier": str(official),
        "official_decision": str(decision)}, follow_redirects=False)
    assert answer.status_code == 303
    text = client.get("/staff/").text
    assert "<strong>0</strong> pending, <strong>1</strong> decided awaiting publication" in text
    assert re.search(rf"decided \w+ \({other}\), not yet published", text)
