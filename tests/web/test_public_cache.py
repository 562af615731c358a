"""Public page cache and ETag follow publications and the active ruleset (its tier names and
public texts); the worker's stamp is reused for a moment and forgotten after any change made
through the app."""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from rules import parse_ruleset
from server.services.policies import activate_version, store_draft
from server.services.review import decide, pending_changes, publish
from tests.web.conftest import ROLE_USER, copy_demo, csrf_of, login, settings_for
from web.app import create_app
from web.caching import STAMP_TTL, StampMemo

POLICY = Path(__file__).resolve().parents[2] / "rules" / "policies" / "county.yaml"


class Clock:
    """A hand-driven monotonic clock."""

    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


@pytest.fixture(scope="module")
def client(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    path = copy_demo(demo_file, tmp_path_factory.mktemp("cache") / "demo.db")
    with TestClient(create_app(settings_for(path))) as c:
        with c.app.state.database.transaction() as session:  # type: ignore[attr-defined]
            change = next(p for p in pending_changes(session=session) if p.region == "D03")
            decide(session=session, assessment_id=change.assessment_id,
                   user=ROLE_USER["approver"], accept=True, tier=None,
                   reason="accepted for the cache test", official_tier=change.official_tier,
                   official_decision_id=change.official_decision_id)
            publish(session=session, user=ROLE_USER["approver"])
        yield c


@pytest.fixture()
def clock(client: TestClient) -> Clock:
    """The app's stamp memo on a hand-driven clock (a fresh memo, so nothing is kept yet)."""
    fake = Clock()
    client.app.state.public_stamps = StampMemo(clock=fake)  # type: ignore[attr-defined]
    return fake


def _store(client: TestClient, level: int, new: str, version: str) -> int:
    """Store the demo policy with tier ``level`` renamed to ``new`` under ``version``."""
    text = POLICY.read_text()
    old = parse_ruleset(text, source=str(POLICY)).tiers[level].name
    text = text.replace(f"name: {old}\n", f"name: {new}\n", 1)
    text = re.sub(r"^version: .*$", f'version: "{version}"', text, count=1, flags=re.M)
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        return store_draft(session=session, text=text, author="test", filename="renamed.yaml")


@pytest.mark.slow
def test_public_page_follows_ruleset_activated_through_the_app(
    client: TestClient, clock: Clock
) -> None:
    first = client.get("/api/public/districts/D03")
    assert first.json()["tier_name"] is not None
    new_id = _store(client, first.json()["tier"], "Renamed-Tier-X", "2031.9")
    login(client, ROLE_USER["admin"])
    csrf = csrf_of(client.get("/staff/policies").text)
    assert client.post(f"/staff/policies/{new_id}/activate", data={"csrf": csrf},
                       follow_redirects=False).status_code == 303
    client.cookies.clear()
    # the clock has not moved: the POST itself made the worker forget its stamp
    again = client.get("/api/public/districts/D03",
                       headers={"If-None-Match": first.headers["etag"]})
    assert again.status_code == 200
    assert again.headers["etag"] != first.headers["etag"]
    # the official tier keeps the name it was decided under; the legend is the active policy's
    assert again.json()["tier_name"] == first.json()["tier_name"]
    assert "Renamed-Tier-X" in client.get("/district/D03").text


@pytest.mark.slow
def test_public_page_follows_outside_change_after_stamp_ttl(
    client: TestClient, clock: Clock
) -> None:
    """A change made outside this worker (here: the service called directly) shows once the
    worker's stamp is older than STAMP_TTL, not before."""
    first = client.get("/api/public/districts/D03")
    new_id = _store(client, first.json()["tier"], "Renamed-Tier-Y", "2031.10")
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        activate_version(session=session, ruleset_id=new_id, actor="test")
    clock.now += STAMP_TTL / 2
    kept = client.get("/api/public/districts/D03")
    assert kept.headers["etag"] == first.headers["etag"]
    clock.now += STAMP_TTL
    fresh = client.get("/api/public/districts/D03",
                       headers={"If-None-Match": first.headers["etag"]})
    assert fresh.status_code == 200
    assert fresh.headers["etag"] != first.headers["etag"]
    assert "Renamed-Tier-Y" in client.get("/district/D03").text  # the active policy's legend


class _NoDatabase:
    def transaction(self) -> None:
        raise AssertionError("the database was used")


def test_public_304_and_cached_page_need_no_database(client: TestClient, clock: Clock) -> None:
    first = client.get("/district/D05")
    assert first.status_code == 200
    app = client.app
    db = app.state.database  # type: ignore[attr-defined]
    app.state.database = _NoDatabase()  # type: ignore[attr-defined]
    try:
        cond = client.get("/district/D05", headers={"If-None-Match": first.headers["etag"]})
        again = client.get("/district/D05")
    finally:
        app.state.database = db  # type: ignore[attr-defined]
    assert cond.status_code == 304
    assert cond.headers["etag"] == first.headers["etag"]
    assert cond.headers["last-modified"] == first.headers["last-modified"]
    assert again.status_code == 200
    assert again.content == first.content
    assert again.headers["content-type"] == first.headers["content-type"]


def test_public_304_to_one_of_several_etags(client: TestClient, clock: Clock) -> None:
    etag = client.get("/").headers["etag"]
    answer = client.get("/", headers={"If-None-Match": f'W/"other", {etag}'})
    assert answer.status_code == 304


def test_public_stale_etag_gets_the_page(client: TestClient, clock: Clock) -> None:
    answer = client.get("/", headers={"If-None-Match": 'W/"0123456789abcdef0123"'})
    assert answer.status_code == 200
    assert answer.headers["etag"] != 'W/"0123456789abcdef0123"'
