"""The review page and the decision API when two approvers decide the same change.

Two browsers (two clients with their own sessions: the demo approver and the demo admin) open
the review page, then post a confirm and an override of the same pending change; the second
one, or the one that loses the race when both are released together by a barrier, gets 409
with its typed reason kept and nothing stored. The demo database is a fresh copy per test.
"""

from __future__ import annotations

import re
import sqlite3
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from tests.web.conftest import copy_demo, csrf_of, login, seen_fields, settings_for
from web.app import create_app

pytestmark = pytest.mark.slow
APPROVER, ADMIN = "otto.approver", "ines.admin"  # invented demo accounts (demo_seed.seed)


@pytest.fixture()
def two(demo_file: Path, tmp_path: Path) -> Iterator[tuple[TestClient, TestClient, Path]]:
    """Two clients of one app on this test's own demo copy, signed in as two approvers."""
    path = copy_demo(demo_file, tmp_path / "demo.db")
    app = create_app(settings_for(path))
    with TestClient(app) as first, TestClient(app) as second:
        login(first, APPROVER)
        login(second, ADMIN)
        yield first, second, path


def _card(page: str) -> tuple[str, str]:
    """(assessment id, district code) of the first pending card."""
    found = re.search(r'<h3 id="p-(\d+)"><a href="/staff/district/(\w+)">', page)
    assert found is not None, "no pending card"
    return found.group(1), found.group(2)


def _decisions(path: Path, code: str) -> list[tuple[str, str]]:
    with sqlite3.connect(path) as db:
        return db.execute(
            "select d.kind, d.reason from decision d join region r on r.id = d.region_id "
            "where r.code = ? and d.kind != 'recorded'", (code,)).fetchall()


def _form(page: str, aid: str, action: str, reason: str, **extra: str) -> dict[str, str]:
    return {"csrf": csrf_of(page), "action": action, "reason": reason,
            **seen_fields(page, aid), **extra}


def test_decide_second_approver_from_the_same_page_gets_409_with_the_reason_kept(
    two: tuple[TestClient, TestClient, Path],
) -> None:
    first, second, path = two
    page_1, page_2 = first.get("/staff/review").text, second.get("/staff/review").text
    aid, code = _card(page_1)
    made = first.post(f"/staff/review/{aid}", data=_form(page_1, aid, "confirm", "agreed"),
                      follow_redirects=False)
    assert made.status_code == 303
    reason = "cluster in the care home <contained>"
    late = second.post(f"/staff/review/{aid}",
                       data=_form(page_2, aid, "override", reason, tier="0"),
                       follow_redirects=False)
    assert late.status_code == 409
    assert "was decided while the form was open" in late.text
    assert "decided by otto.approver" in late.text
    assert "cluster in the care home &lt;contained&gt;" in late.text
    assert _decisions(path, code) == [("confirmed", "agreed")]


def test_decide_confirm_and_override_at_the_same_moment_store_one(
    two: tuple[TestClient, TestClient, Path],
) -> None:
    first, second, path = two
    page_1, page_2 = first.get("/staff/review").text, second.get("/staff/review").text
    aid, code = _card(page_1)
    posts = [
        (first, _form(page_1, aid, "confirm", "confirm at the meeting")),
        (second, _form(page_2, aid, "override", "override: figures corrected", tier="0")),
    ]
    barrier = threading.Barrier(2)
    answers: list[Any] = [None, None]

    def post(k: int) -> None:
        client, data = posts[k]
        barrier.wait()
        answers[k] = client.post(f"/staff/review/{aid}", data=data, follow_redirects=False)

    threads = [threading.Thread(target=post, args=(k,)) for k in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    codes = sorted(a.status_code for a in answers)
    assert codes == [303, 409]
    loser = next(k for k in range(2) if answers[k].status_code == 409)
    kept = posts[loser][1]["reason"]
    assert kept in answers[loser].text
    stored = _decisions(path, code)
    assert len(stored) == 1 and stored[0][1] == posts[1 - loser][1]["reason"]


def test_decide_form_without_the_official_tier_it_saw_is_refused(
    two: tuple[TestClient, TestClient, Path],
) -> None:
    first, _second, path = two
    page = first.get("/staff/review").text
    aid, code = _card(page)
    answer = first.post(f"/staff/review/{aid}", data={
        "csrf": csrf_of(page), "action": "confirm", "reason": "agreed"})
    assert answer.status_code == 422
    assert "official_tier" in answer.text
    assert _decisions(path, code) == []


def test_decide_api_names_what_it_saw_and_gets_409_when_old(
    two: tuple[TestClient, TestClient, Path],
) -> None:
    first, second, path = two
    page_1, page_2 = first.get("/staff/review").text, second.get("/staff/review").text
    aid, code = _card(page_1)
    seen = seen_fields(page_1, aid)
    body = {"action": "confirm", "reason": "agreed by phone",
            "official_tier": None if seen["official_tier"] == "none"
            else int(seen["official_tier"]),
            "official_decision_id": None if seen["official_decision"] == "none"
            else int(seen["official_decision"])}
    url = f"/api/review/{aid}/decision"
    assert first.post(url, json=body).status_code == 403  # no X-CSRF-Token header
    missing = {k: v for k, v in body.items() if k != "official_tier"}
    assert first.post(url, json=missing,
                      headers={"X-CSRF-Token": csrf_of(page_1)}).status_code == 422
    made = first.post(url, json=body, headers={"X-CSRF-Token": csrf_of(page_1)})
    assert made.status_code == 201, made.text
    assert made.json()["kind"] == "confirmed"
    again = second.post(url, json={**body, "action": "override", "tier": 0,
                                   "reason": "typed in the other office"},
                        headers={"X-CSRF-Token": csrf_of(page_2)})
    assert again.status_code == 409
    assert again.json()["conflict"] == "decided_meanwhile"
    assert again.json()["reason"] == "typed in the other office"
    assert _decisions(path, code) == [("confirmed", "agreed by phone")]
