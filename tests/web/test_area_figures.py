"""Where a district's criterion uses its area's figure (the ICU share: ICU beds are reported per
area), on the district page and the explanation; and the area page showing the area's own tier
once a policy set at area level (rules/policies/hospital.yaml) is active. On the demo."""

from __future__ import annotations

import re
from pathlib import Path

from fastapi.testclient import TestClient

from server.services.ruleset_activation import store_ruleset
from tests.web.conftest import ROLE_USER, login

HOSPITAL = Path(__file__).resolve().parents[2] / "rules" / "policies" / "hospital.yaml"
NOTE = "Figure of area Astrel Downs: the district reports none of its own."


def _section(html: str, heading_id: str) -> str:
    found = re.search(rf'<section aria-labelledby="{heading_id}">(.*?)</section>', html, re.S)
    assert found is not None, heading_id
    return found.group(1)


def test_the_district_page_says_which_criterion_is_the_areas_figure(
    demo_app_client: TestClient,
) -> None:
    assert login(demo_app_client, ROLE_USER["analyst"]) == 303
    html = demo_app_client.get("/staff/district/D06").text
    assert NOTE in _section(html, "c-icu")
    assert "Figures of area Astrel Downs" in _section(html, "c-icu")
    for own in ("c-incidence", "c-positivity", "c-admissions"):  # the district's own counts
        assert "Figure of area" not in _section(html, own)
    german = demo_app_client.get("/staff/district/D06?lang=de").text
    assert "Wert des Gebiets Astrel Downs: Der Bezirk meldet keinen eigenen." in german


def test_the_explanation_says_it_too(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, ROLE_USER["analyst"]) == 303
    html = demo_app_client.get("/staff/district/D06/explain").text
    rows = re.findall(r'<tr><th scope="row">(.*?)</th>', html, re.S)
    icu = [r for r in rows if r.startswith("ICU share")]
    assert icu and "figure of area Astrel Downs (the district reports none of its own)" in icu[0]
    assert all("figure of area" not in r for r in rows if not r.startswith("ICU share"))


def test_the_area_page_shows_the_tier_of_an_area_level_policy(
    demo_app_client: TestClient,
) -> None:
    assert login(demo_app_client, ROLE_USER["analyst"]) == 303
    before = demo_app_client.get("/staff/areas/R2/capacity").text
    assert "Tier of the area" not in before  # the demo's policy is set per district
    db = demo_app_client.app.state.database  # type: ignore[attr-defined]
    with db.transaction() as session:
        store_ruleset(session=session, path=HOSPITAL, author="test", activate=True)
    html = demo_app_client.get("/staff/areas/R2/capacity").text
    tier = _section(html, "tier-h")
    assert "under hospital-demo 2031.1 on 2026-11-30." in tier
    assert re.search(r"Wards (clear|busy|stretched|overrun)", tier)
    german = _section(demo_app_client.get("/staff/areas/R2/capacity?lang=de").text, "tier-h")
    assert "Stufe des Gebiets" in german and "Stationen" in german


def test_the_district_page_shows_its_areas_tier_beside_its_own(
    demo_app_client: TestClient, tmp_path: Path,
) -> None:
    # Several active policies at once (a district policy and the area policy) are simulated by
    # activating a copy of the county policy and marking the area policy active again.
    from sqlalchemy import update

    from server.store.models import Ruleset as RulesetRow

    assert login(demo_app_client, ROLE_USER["analyst"]) == 303
    county = tmp_path / "county-copy.yaml"
    county.write_text((HOSPITAL.parent / "county.yaml").read_text().replace(
        "name: county-demo", "name: county-copy", 1))
    db = demo_app_client.app.state.database  # type: ignore[attr-defined]
    with db.transaction() as session:
        store_ruleset(session=session, path=HOSPITAL, author="test")
        store_ruleset(session=session, path=county, author="test", activate=True)
        session.execute(update(RulesetRow).where(RulesetRow.name == "hospital-demo")
                        .values(status="active"))
    with db.transaction() as session:  # the area policy evaluated (idempotent if it was)
        from server.services.evaluation import evaluate_districts

        row = session.query(RulesetRow).filter_by(name="hospital-demo").one()
        evaluate_districts(session=session, ruleset_row=row)
    html = demo_app_client.get("/staff/district/D06").text
    found = re.search(r'<ul class="area-tiers">(.*?)</ul>', html, re.S)
    assert found is not None
    line = found.group(1)
    assert "Astrel Downs, under the policy set for it:" in line
    assert re.search(r"Wards (clear|busy|stretched|overrun)", line)
    assert 'href="/staff/areas/R2/capacity"' in line
    assert NOTE in _section(html, "c-icu")  # the district policy's own criteria as before
