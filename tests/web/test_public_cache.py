"""Public page cache and ETag follow the active ruleset (its tier names and public texts)."""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from server.services.policies import activate_version, store_draft
from server.services.review import decide, pending_changes, publish
from tests.web.conftest import ROLE_USER, copy_demo, settings_for
from web.app import create_app

POLICY = Path(__file__).resolve().parents[2] / "rules" / "policies" / "county.yaml"


@pytest.fixture(scope="module")
def client(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    path = copy_demo(demo_file, tmp_path_factory.mktemp("cache") / "demo.db")
    with TestClient(create_app(settings_for(path))) as c:
        with c.app.state.database.transaction() as session:  # type: ignore[attr-defined]
            change = next(p for p in pending_changes(session=session) if p.region == "D03")
            decide(session=session, assessment_id=change.assessment_id,
                   user=ROLE_USER["approver"], accept=True, tier=None,
                   reason="accepted for the cache test")
            publish(session=session, user=ROLE_USER["approver"])
        yield c


def _renamed(old: str, new: str) -> str:
    """The demo policy with tier ``old`` renamed to ``new`` under a higher version."""
    text = POLICY.read_text().replace(f"name: {old}\n", f"name: {new}\n", 1)
    return re.sub(r"^version: .*$", 'version: "2031.9"', text, count=1, flags=re.M)


@pytest.mark.slow
def test_public_page_follows_newly_activated_ruleset(client: TestClient) -> None:
    first = client.get("/api/public/districts/D03")
    old_name = first.json()["tier_name"]
    assert old_name is not None
    # Warm the page cache, then activate a ruleset that renames the district's tier.
    assert client.get("/api/public/districts/D03").json()["tier_name"] == old_name
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        new_id = store_draft(session=session, text=_renamed(old_name, "Renamed-Tier-X"),
                             author="test", filename="renamed.yaml")
        activate_version(session=session, ruleset_id=new_id, actor="test")
    again = client.get("/api/public/districts/D03",
                       headers={"If-None-Match": first.headers["etag"]})
    assert again.status_code == 200
    assert again.headers["etag"] != first.headers["etag"]
    assert again.json()["tier_name"] == "Renamed-Tier-X"
