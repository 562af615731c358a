"""The explanation's counter rows: a tier that has not changed in the evaluated period shows no
day count (the engine's "never changed" value is an internal sentinel, rules.hysteresis)."""

from __future__ import annotations

import pytest
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from rules.hysteresis import NEVER_CHANGED
from server.readmodels.dossier import explanation_page
from server.store.models import Assessment


@pytest.mark.slow
def test_first_day_shows_no_days_since_a_change(demo_session: Session) -> None:
    first = demo_session.scalar(select(func.min(Assessment.ref_date)))
    assert first is not None
    page = explanation_page(session=demo_session, code="D01", day=first)
    rows = dict(page.counters)
    since = rows["Days since the last change"]
    assert since.startswith("— (minimum ")  # no change yet on the first evaluated day
    assert str(NEVER_CHANGED) not in since and "100" not in since.split("(")[0]
