"""The printable briefing with the measures and their effects (``?effects=1``)."""

from __future__ import annotations

import html
import re
from datetime import UTC, date, datetime

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from server.store.models import Decision, Region
from tests.web.conftest import login

DAY = "2026-11-20"


@pytest.fixture(scope="module")
def client(demo_app_client: TestClient) -> TestClient:
    """The demo with published tier changes of D01 on 1 October and 15 November."""
    now = datetime(2026, 11, 30, 9, tzinfo=UTC)
    with demo_app_client.app.state.database.transaction() as s:  # type: ignore[attr-defined]
        region = s.scalar(select(Region).where(Region.code == "D01"))
        assert region is not None
        for day, tier in ((date(2026, 8, 1), 0), (date(2026, 10, 1), 1),
                          (date(2026, 11, 15), 2)):
            s.add(Decision(region_id=region.id, effective_date=day, tier=tier,
                           kind="confirmed", reason="invented", decided_at=now,
                           published_at=now, policy="county-demo"))
    return demo_app_client


def test_briefing_leaves_the_effects_out_unless_asked(client: TestClient) -> None:
    assert login(client, "vic.viewer") == 303
    page = client.get("/staff/district/D01/explain", params={"day": DAY})
    assert page.status_code == 200
    assert 'id="effects-h"' not in page.text
    assert 'name="effects" value="1">' in page.text  # the box, not ticked


def test_briefing_includes_events_with_estimates_or_too_early(client: TestClient) -> None:
    assert login(client, "vic.viewer") == 303
    page = client.get("/staff/district/D01/explain", params={"day": DAY, "effects": "1"})
    assert page.status_code == 200
    text = html.unescape(page.text)
    assert 'id="effects-h"' in text and 'name="effects" value="1" checked' in text
    section = text[text.index('id="effects-h"'):]
    rows = re.findall(r'<tr data-status="([a-z_]+)"><td class="date">([0-9-]{10})', section)
    assert ("ready", "2026-10-01") in rows
    # 15 November: after window ends 7 + 7 + 14 - 1 days later, plus 3 settle days
    assert ("too_early", "2026-11-15") in rows
    assert "Too early to tell; can say from 2026-12-15." in section
    assert re.search(r'data-mark="(admissions|wastewater)"', section)
    assert "<small data-agreement>" in section
