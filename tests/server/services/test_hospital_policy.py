"""The demo's hospital-pressure policy (rules/policies/hospital.yaml), evaluated per area on the
seeded demo county: it passes ``tierwise rules check`` and its areas stand at different tiers
in the story's last weeks (the west past its wave, the centre and the east under pressure:
demo_seed/storyline.py)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import select
from sqlalchemy.orm import Session
from typer.testing import CliRunner

from server.cli import app
from server.services.evaluation import evaluate_districts
from server.services.ruleset_activation import store_ruleset
from server.store.models import Assessment, Region

HOSPITAL = Path(__file__).resolve().parents[3] / "rules" / "policies" / "hospital.yaml"


def test_rules_check_passes() -> None:
    result = CliRunner().invoke(app, ["rules", "check", str(HOSPITAL)])
    assert result.exit_code == 0, result.output
    assert "Applies to the areas" in result.output


@pytest.mark.slow
def test_the_hospital_policy_gives_the_demo_areas_more_than_one_tier(
    demo_session: Session,
) -> None:
    row = store_ruleset(session=demo_session, path=HOSPITAL, author="test")
    assert row.status == "draft"  # evaluated explicitly, not activated
    run = evaluate_districts(session=demo_session, ruleset_row=row)
    assert run is not None and run.evaluation is not None and not run.reused
    ev = run.evaluation
    areas = set(demo_session.scalars(select(Region.code).where(
        Region.id.in_(select(Region.parent_id).where(Region.level == "district")))))
    assert set(ev.regions) == areas and len(areas) > 1
    stored = set(demo_session.scalars(
        select(Region.code).join(Assessment, Assessment.region_id == Region.id)
        .where(Assessment.ruleset_id == row.id)))
    assert stored == areas
    last_weeks = ev.tier[:, -28:]
    assert (last_weeks >= 0).all()  # every area has its data: no insufficient-data days
    differing = [d for d in range(last_weeks.shape[1]) if np.unique(last_weeks[:, d]).size > 1]
    assert differing, last_weeks
    assert ev.dates[-1].astype(object) == run.end
    # the prepare signals on the projected ICU share are computed for the areas too
    assert ev.prepare.shape[1] == len(areas)
