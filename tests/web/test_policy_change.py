"""Changing the policy to one with fewer tiers than the official tiers on record.

The demo county's officials (under its four-tier policy) include tier 3; activating the shipped
two-tier ``persistence-500`` policy must keep every staff and public page answering, with each
official tier named under the ruleset it was decided under, and the review saying how the new
policy takes over.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from server.services.review import decide, official_tiers, pending_changes, publish
from server.services.ruleset_activation import store_ruleset
from server.services.rulesets import active_ruleset, policies_dir
from server.store.models import Decision, Region
from tests.web.conftest import copy_demo, login, settings_for
from web.app import create_app

pytestmark = pytest.mark.slow
APPROVER = "otto.approver"  # invented demo account (demo_seed.seed)


@pytest.fixture(scope="module")
def changed(demo_file: Path, tmp_path_factory: pytest.TempPathFactory
            ) -> Iterator[tuple[TestClient, dict[str, tuple[int, str]], str]]:
    """The demo with every district published, one at tier 3, then persistence-500 active.

    Yields the client, the official (tier, name) of each district before the change, and the
    old policy's "name version"."""
    path = copy_demo(demo_file, tmp_path_factory.mktemp("policy-change") / "demo.db")
    with TestClient(create_app(settings_for(path))) as client:
        db = client.app.state.database  # type: ignore[attr-defined]
        with db.transaction() as s:
            change = next(p for p in pending_changes(session=s))
            decide(session=s, assessment_id=change.assessment_id, user=APPROVER, accept=False,
                   tier=3, reason="invented: tier 3 before the policy change",
                   official_tier=change.official_tier,
                   official_decision_id=change.official_decision_id)
            publish(session=s, user=APPROVER)
        with db.transaction() as s:
            old = active_ruleset(session=s)
            assert old is not None
            before = {c: (o.tier, o.tier_name) for c, o in official_tiers(session=s).items()}
            assert 3 in {t for t, _ in before.values()}
            # persistence-500 takes over from the demo's policy (several policies may be
            # active at once: only ``replaces`` retires one of another name)
            store_ruleset(session=s, path=policies_dir(None) / "persistence-500.yaml",
                          author="test", activate=True, replaces=old.name)
        yield client, before, f"{old.name} {old.version}"


@pytest.mark.parametrize("page", ["/staff/", "/staff/review", "/staff/review?all=1",
                                  "/staff/district/D01", "/staff/district/D01/explain"])
def test_staff_pages_answer_after_a_policy_with_fewer_tiers(
    changed: tuple[TestClient, dict[str, tuple[int, str]], str], page: str
) -> None:
    client, _before, _old = changed
    login(client, APPROVER)
    answer = client.get(page)
    assert answer.status_code == 200, answer.text[-2000:]


@pytest.mark.parametrize("page", ["/", "/api/public/districts", "/district/D01",
                                  "/api/public/districts/D01"])
def test_public_pages_answer_after_a_policy_with_fewer_tiers(
    changed: tuple[TestClient, dict[str, tuple[int, str]], str], page: str
) -> None:
    client, _before, _old = changed
    client.cookies.clear()
    assert client.get(page).status_code == 200


def test_official_tiers_keep_their_old_names(
    changed: tuple[TestClient, dict[str, tuple[int, str]], str],
) -> None:
    client, before, old = changed
    db = client.app.state.database  # type: ignore[attr-defined]
    with db.sessions() as s:
        after = {c: (o.tier, o.tier_name, o.ruleset_label)
                 for c, o in official_tiers(session=s).items()}
    assert {c: t[:2] for c, t in after.items()} == before
    top = [c for c, (tier, _n) in before.items() if tier == 3]
    assert {after[c][2] for c in top} == {old}
    login(client, APPROVER)
    overview = client.get("/staff/").text
    assert all(before[c][1] in overview for c in top)
    names = {d["code"]: d["tier_name"] for d in client.get("/api/public/districts").json()}
    # every official tier, also 0 and 1 which the new policy names otherwise
    assert {c: n for c, n in names.items() if c in before} == {c: n for c, (_t, n) in
                                                                before.items()}
    assert {"Standard", "Hotspot"}.isdisjoint(names.values())


def test_review_says_how_the_new_policy_takes_over(
    changed: tuple[TestClient, dict[str, tuple[int, str]], str],
) -> None:
    client, before, old = changed
    login(client, APPROVER)
    page = client.get("/staff/review").text
    db = client.app.state.database  # type: ignore[attr-defined]
    with db.sessions() as s:
        pending = pending_changes(session=s)
        codes = dict(s.execute(select(Region.id, Region.code)).all())
        kinds = {codes[d.region_id] for d in s.scalars(select(Decision))}
    high = [p for p in pending if p.official_tier == 3]
    assert high, "the district at tier 3 awaits a decision on the two-tier scale"
    name = before[high[0].region][1]
    note = (f"Official: {name} (3) under {old}; the active policy persistence-500 2021.12 "
            "has tiers 0–1: the next decision will be on its scale")
    assert high[0].official_note == note
    assert note in page
    assert high[0].region in kinds
    # the history names old decisions under their own policy
    assert re.search(rf"<td>3 {re.escape(name)}</td>", client.get("/staff/review?all=1").text)
