"""Activating a ruleset (server/services/ruleset_activation.py): one way to activate, the other
versions of the policy retired, audited, evaluated; other policies stay active unless replaced."""

from __future__ import annotations

from pathlib import Path

import pytest
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.services.policies import activate_version
from server.services.review import current_run
from server.services.ruleset_activation import store_ruleset
from server.services.rulesets import active_rulesets
from server.store.models import AuditEntry

pytestmark = pytest.mark.slow

# --- one way to activate: the other versions of the policy retired, audited, evaluated ---
# (since several policies may be active at once, activating another name no longer retires
# the demo's policy; ``replaces`` does)

COUNTY = Path(__file__).resolve().parents[3] / "rules" / "policies" / "county.yaml"


def _variant(folder: Path, name: str, version: str) -> Path:
    """The demo county's policy under another (invented) name and version."""
    text = COUNTY.read_text().replace("name: county-demo", f"name: {name}", 1)
    path = folder / f"{name}-{version}.yaml"
    path.write_text(text.replace('version: "2031.2"', f'version: "{version}"', 1))
    return path


def _active_names(session: Session) -> list[str]:
    return [r.name for r in active_rulesets(session=session)]


def _active_versions(session: Session) -> list[tuple[str, str]]:
    return sorted((r.name, r.version) for r in active_rulesets(session=session))


def test_store_ruleset_activation_keeps_other_policies_and_replaces_on_request(
    demo_session: Session, tmp_path: Path
) -> None:
    store_ruleset(session=demo_session, path=_variant(tmp_path, "calm", "1"), activate=True)
    assert _active_names(demo_session) == ["county-demo", "calm"]  # the first stored leads
    store_ruleset(session=demo_session, path=_variant(tmp_path, "brisk", "1"), activate=True,
                  replaces="county-demo")
    assert _active_names(demo_session) == ["calm", "brisk"]


def test_activations_by_both_ways_leave_one_active_version_per_policy(
    demo_session: Session, tmp_path: Path
) -> None:
    seen = []
    for k, name in enumerate(["calm", "brisk", "calm", "brisk"]):
        if k % 2:
            row = store_ruleset(session=demo_session, path=_variant(tmp_path, name, str(k)))
            activate_version(session=demo_session, ruleset_id=row.id, actor="rev")
        else:
            store_ruleset(session=demo_session, path=_variant(tmp_path, name, str(k)),
                          author="rev", activate=True)
        seen.append(_active_versions(demo_session))
    assert seen == [
        [("calm", "0"), ("county-demo", "2031.2")],
        [("brisk", "1"), ("calm", "0"), ("county-demo", "2031.2")],
        [("brisk", "1"), ("calm", "2"), ("county-demo", "2031.2")],
        [("brisk", "3"), ("calm", "2"), ("county-demo", "2031.2")],
    ]


def test_activation_is_audited_and_evaluates_the_new_ruleset(
    demo_session: Session, tmp_path: Path
) -> None:
    row = store_ruleset(session=demo_session, path=_variant(tmp_path, "calm", "1"),
                        author="rev", activate=True)
    latest = current_run(session=demo_session, policy="calm")
    assert latest is not None and latest.ruleset_row.id == row.id and len(latest.items) == 14
    actions = list(demo_session.scalars(select(AuditEntry.subject).where(
        AuditEntry.action == "ruleset.activate", AuditEntry.actor == "rev")))
    assert actions == ["calm 1"]
