"""The Policies page's background backtest of a policy with a seasonal indicator, as known.

The influenza policy's ``seasonal_intensity`` needs past seasons, which the as-known replay once
computed on its 56-day windows and failed on ("cannot reshape array"); the job page showed that
error. Here the job runs to completion and its figures are the service's
(:func:`server.services.backtest.run_backtest` on the same database). Invented demo data.
"""

from __future__ import annotations

import re
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from server.services.backtest import run_backtest
from server.services.ruleset_cache import parsed
from server.store.models import Ruleset as RulesetRow
from tests.web.conftest import ROLE_USER, copy_demo, csrf_of, login, settings_for
from web.app import create_app

POLL_SECONDS = 300.0


@pytest.fixture(scope="module")
def client_flu(
    several_policies_file: Path, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[tuple[TestClient, int]]:
    """A client on its own copy of the demo with the influenza policy active, and its id."""
    path = copy_demo(several_policies_file, tmp_path_factory.mktemp("flu") / "demo.db")
    with TestClient(create_app(settings_for(path))) as c:
        with c.app.state.database.transaction() as session:  # type: ignore[attr-defined]
            flu = session.scalar(select(RulesetRow.id).where(
                RulesetRow.name == "county-influenza", RulesetRow.status == "active"))
        assert flu is not None
        yield c, flu


def _poll(client: TestClient, url: str) -> str:
    deadline = time.monotonic() + POLL_SECONDS
    while True:
        page = client.get(url)
        assert page.status_code == 200, page.text[:300]
        if 'http-equiv="refresh"' not in page.text:
            return page.text
        assert time.monotonic() < deadline, "backtest did not finish in time"
        time.sleep(0.5)


@pytest.mark.slow
def test_influenza_as_known_backtest_shows_its_figures(
    client_flu: tuple[TestClient, int],
) -> None:
    client, flu = client_flu
    login(client, ROLE_USER["analyst"])
    csrf = csrf_of(client.get(f"/staff/policies?id={flu}").text)
    answer = client.post(f"/staff/policies/{flu}/backtest",
                         data={"csrf": csrf, "compare": "", "as_known": "1"},
                         follow_redirects=False)
    assert answer.status_code == 303
    page = _poll(client, answer.headers["location"])
    assert "The backtest failed" not in page
    assert "reshape" not in page
    assert "the data as known each day" in page
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        row = session.get(RulesetRow, flu)
        assert row is not None
        want = run_backtest(session=session, ruleset=parsed(row), as_known=True,
                            time_zone=client.app.state.settings.zone).summary  # type: ignore[attr-defined]
    got = re.findall(r'data-figure="changes_per_year">([^<]*)<', page)
    assert got == [f"{want.changes_per_year:.1f}"]
    assert re.findall(r'data-figure="escalations">([^<]*)<', page) == [str(want.escalations)]
