"""Pages with several active policies: the overview's column per policy, the district page,
explanation and review queue per policy (``?policy=``), the public pages and downloads naming
each published policy.

The database is the invented demo county with its three policies (``several_policies_file`` in
tests/conftest.py); the checks are the design's own contract (issue 14, item 4).
"""

from __future__ import annotations

import csv
import io
import re
import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from server.readmodels.policy_columns import policy_columns
from server.services.review import decide, official_tiers, pending_changes, publish
from server.services.rulesets import active_rulesets
from tests.web.conftest import ROLE_USER, csrf_of, login, settings_for
from web.app import create_app

pytestmark = pytest.mark.slow
POLICIES = ["county-demo", "county-influenza", "county-rsv"]


@pytest.fixture(scope="module")
def client(several_policies_file: Path, tmp_path_factory: pytest.TempPathFactory
           ) -> Iterator[TestClient]:
    path = tmp_path_factory.mktemp("policy-pages") / "demo.db"
    shutil.copyfile(several_policies_file, path)
    with TestClient(create_app(settings_for(path))) as c:
        yield c


def _db(client: TestClient):  # type: ignore[no-untyped-def]
    return client.app.state.database  # type: ignore[attr-defined]


def test_overview_has_a_column_per_policy_with_each_district_tier(client: TestClient) -> None:
    login(client, ROLE_USER["analyst"])
    page = client.get("/staff/")
    assert page.status_code == 200
    with _db(client).sessions() as s:
        columns = policy_columns(session=s)
        pending = {name: pending_changes(session=s, policy=name) for name in POLICIES}
    assert [c.name for c in columns] == POLICIES
    for column in columns[1:]:
        cells = re.findall(rf'<td class="policy-cell" data-policy="{column.name}">(.*?)</td>',
                           page.text, flags=re.S)
        assert len(cells) == 14  # one per invented district
        assert f'<th scope="col" class="policy-col">{column.name}' in page.text
        # the history published every district under every policy
        assert all(cell.official_tier is not None for cell in column.cells.values())
    # the lede names each policy with its number of pending changes
    for name in POLICIES:
        assert re.search(rf'policy={name}">{name}</a>( <small>\(lead\)</small>)?: '
                         rf'{len(pending[name])} pending', page.text)
    # pending changes of the other policies are flagged in their column, naming the policy
    flagged = page.text.count("pending change (county-influenza)")
    assert flagged == len(pending["county-influenza"])


def test_overview_cells_hold_the_policy_official_and_recommended_tiers(
    client: TestClient
) -> None:
    with _db(client).sessions() as s:
        column = policy_columns(session=s)[1]
        official = official_tiers(session=s, policy=column.name)
    assert {code: c.official_tier for code, c in column.cells.items()} == {
        code: o.tier for code, o in official.items()}


def test_district_page_per_policy_with_a_selector(client: TestClient) -> None:
    login(client, ROLE_USER["analyst"])
    lead = client.get("/staff/district/D01")
    flu = client.get("/staff/district/D01?policy=county-influenza")
    assert lead.status_code == flu.status_code == 200
    assert "Policy county-demo 2031.2." in lead.text
    assert re.search(r"Policy county-influenza [\d.]+\.", flu.text)
    assert '<option value="county-influenza" selected>' in flu.text
    assert "Flu quiet" in flu.text and "Flu quiet" not in lead.text
    # the explanation links keep the policy
    assert "/explain?day=" in flu.text and "&amp;policy=county-influenza" in flu.text
    explained = client.get("/staff/district/D01/explain?policy=county-rsv")
    assert explained.status_code == 200 and "county-rsv version" in explained.text
    assert client.get("/staff/district/D01?policy=no-such-policy").status_code == 404


def test_review_queue_groups_and_filters_by_policy(client: TestClient) -> None:
    login(client, ROLE_USER["approver"])
    page = client.get("/staff/review").text
    with _db(client).sessions() as s:
        pending = pending_changes(session=s)
    shown = [p for p in POLICIES if any(c.policy == p for c in pending)]
    assert len(shown) >= 2
    positions = [page.index(f'id="policy-{name}"') for name in shown]
    assert positions == sorted(positions)  # grouped, in policy order
    one = client.get(f"/staff/review?policy={shown[1]}").text
    assert f'id="policy-{shown[0]}"' not in one and f'id="policy-{shown[1]}"' in one
    assert client.get("/staff/review?policy=no-such-policy").status_code == 404


def test_public_pages_list_each_published_policy_with_its_meaning(client: TestClient) -> None:
    client.cookies.clear()
    index = client.get("/").text
    for name in POLICIES[1:]:
        assert f'<th scope="col" class="policy-col">{name}</th>' in index
    page = client.get("/district/D01").text
    with _db(client).sessions() as s:
        rows = active_rulesets(session=s)
        flu = official_tiers(session=s, policy="county-influenza")["D01"]
    assert "Other alert tiers" in page
    assert "<h3 id=\"policy-1\">county-influenza</h3>" in page
    assert flu.tier_name in page and flu.public_text in page
    assert rows[1].name == "county-influenza"
    data = client.get("/api/public/districts/D01").json()
    assert [p["policy"] for p in data["policies"]] == POLICIES[1:]
    assert data["policies"][0]["meaning"] == flu.public_text


def test_downloads_and_feeds_name_the_policy(client: TestClient) -> None:
    client.cookies.clear()
    table = list(csv.DictReader(io.StringIO(client.get("/data/tiers.csv").text)))
    assert {row["policy"] for row in table} == set(POLICIES)
    assert sum(row["code"] == "D01" for row in table) == 3
    changes = list(csv.DictReader(io.StringIO(client.get("/data/tier_changes.csv").text)))
    assert {row["policy"] for row in changes} == set(POLICIES)
    feed = client.get("/feeds/tiers.atom").text
    assert 'term="county-rsv"' in feed and "Policy county-influenza: " in feed


def test_german_overview_names_the_policies(client: TestClient) -> None:
    login(client, ROLE_USER["analyst"])
    page = client.get("/staff/?lang=de").text
    assert "Aktive Regelwerke:" in page and "(führend)" in page


def test_a_publication_under_one_policy_is_a_change_of_that_policy(client: TestClient) -> None:
    """Decides and publishes one pending change of a policy other than the lead (the tests
    after it read the state as they find it). The overview's changes name the policy; the lead
    policy's official tiers stay."""
    with _db(client).transaction() as s:
        change = next(p for p in pending_changes(session=s) if p.policy != "county-demo")
        lead_before = official_tiers(session=s, policy="county-demo")
        decide(session=s, assessment_id=change.assessment_id, user=ROLE_USER["approver"],
               accept=True, tier=None, reason="invented: agreed",
               official_tier=change.official_tier,
               official_decision_id=change.official_decision_id)
        publish(session=s, user=ROLE_USER["approver"], policy=change.policy)
    with _db(client).sessions() as s:
        assert official_tiers(session=s, policy="county-demo") == lead_before
        assert official_tiers(session=s, policy=change.policy)[change.region].tier == (
            change.recommended_tier)
    login(client, ROLE_USER["analyst"])
    page = client.get("/staff/").text
    assert f"{change.policy}: official tier published:" in page


def test_pending_only_keeps_the_districts_with_a_change_under_any_policy(
    client: TestClient,
) -> None:
    login(client, ROLE_USER["analyst"])
    page = client.get("/staff/?pending=true").text
    with _db(client).sessions() as s:
        codes = {p.region for p in pending_changes(session=s)}
    shown = set(re.findall(r'<th scope="row"><a href="/staff/district/(D\d+)">', page))
    assert shown == codes and len(shown) < 14


def test_a_refused_form_keeps_its_reason_in_its_own_policy_form(client: TestClient) -> None:
    login(client, ROLE_USER["approver"])
    csrf = csrf_of(client.get("/staff/review").text)
    with _db(client).sessions() as s:
        pending = pending_changes(session=s)
    regions = [p.region for p in pending]
    # a district with changes under two policies when there is one (both forms on the page)
    change = next((p for p in pending if regions.count(p.region) > 1), pending[-1])
    answer = client.post(f"/staff/review/{change.assessment_id}", data={
        "csrf": csrf, "action": "override", "tier": "", "reason": "invented kept reason",
        "official_tier": "none" if change.official_tier is None else str(change.official_tier),
        "official_decision": ("none" if change.official_decision_id is None
                              else str(change.official_decision_id))})
    assert answer.status_code == 422
    kept = re.findall(r'<textarea id="reason-(\d+)"[^>]*>invented kept reason</textarea>',
                      answer.text)
    assert kept == [str(change.assessment_id)]


def test_policies_page_lets_one_pick_each_active_policy(client: TestClient) -> None:
    login(client, ROLE_USER["admin"])
    page = client.get("/staff/policies").text
    with _db(client).sessions() as s:
        rows = active_rulesets(session=s)
    assert f'<h2 id="active-h">{rows[0].name} {rows[0].version}' in page  # the lead by default
    for row in rows[1:]:
        assert f'<a href="/staff/policies?id={row.id}">{row.name} {row.version}</a>' in page
        picked = client.get(f"/staff/policies?id={row.id}").text
        assert f'<h2 id="active-h">{row.name} {row.version}' in picked
