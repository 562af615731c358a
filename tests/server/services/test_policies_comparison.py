"""Policy versions compared item by item, with units (server.services.policies)."""

from __future__ import annotations

import re
from pathlib import Path

from sqlalchemy.orm import Session

from server.services.policies import policy_comparison, policy_view, store_draft

POLICY = (Path(__file__).parents[3] / "rules" / "policies" / "county.yaml").read_text()


def _store(session: Session, text: str) -> int:
    return store_draft(session=session, text=text, author="test")


def test_policy_comparison_lists_changed_threshold_with_units(session: Session) -> None:
    old = _store(session, POLICY)
    changed = re.sub(r"^version: .*$", 'version: "2031.9"', POLICY, count=1, flags=re.M)
    changed = changed.replace("enter: [75, 150, 300]", "enter: [80, 150, 300]", 1)
    changed = changed.replace("confirm_days: 5", "confirm_days: 7", 1)
    new = _store(session, changed)
    comparison = policy_comparison(session=session, old_id=old, new_id=new)
    diffs = {(c.section, c.item): (c.old, c.new) for c in comparison.changed}
    assert diffs[("Thresholds", "7-day incidence (inactive below 20 events): Heightened (1)")] == (
        "≥ 75 per 100 000 (leave < 35 per 100 000)", "≥ 80 per 100 000 (leave < 35 per 100 000)")
    assert diffs[("Timing", "Days to confirm a rise")] == ("5", "7")
    assert len(diffs) == 2


def test_policy_comparison_of_a_version_with_itself_has_no_change(session: Session) -> None:
    rid = _store(session, POLICY)
    assert policy_comparison(session=session, old_id=rid, new_id=rid).changed == ()


def test_policy_view_threshold_cells_carry_the_unit(session: Session) -> None:
    view = policy_view(session=session, ruleset_id=_store(session, POLICY))
    assert view is not None
    positivity = next(r for r in view.thresholds if r.indicator == "positivity_7d")
    assert positivity.cells[0] == "≥ 6.0% (leave < 3.0%)"
