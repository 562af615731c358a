"""Backtest pages: role and CSRF refusals, a background job run to completion, its result page.

The expected figures come from :func:`server.services.backtest.run_backtest` called directly on
the same database (the page must show the service's summary, not a figure of its own), and the
number of districts from the store.
"""

from __future__ import annotations

import re
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import NoReturn

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from server.services import backtest_jobs
from server.services.backtest import run_backtest
from server.services.policies import store_draft
from server.services.ruleset_cache import parsed
from server.store.models import Region
from server.store.models import Ruleset as RulesetRow
from tests.web.conftest import ROLE_USER, copy_demo, csrf_of, login, settings_for
from web.app import create_app

POLL_SECONDS = 60.0


def _variant(text: str) -> str:
    """The active policy with lower incidence thresholds under a higher version."""
    text = text.replace("enter: [75, 150, 300]\n    exit: [35, 110, 230]",
                        "enter: [50, 100, 200]\n    exit: [25, 70, 150]", 1)
    return re.sub(r"^version: .*$", 'version: "2031.77"', text, count=1, flags=re.M)


@pytest.fixture(scope="module")
def client_ids(
    demo_file: Path, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[tuple[TestClient, int, int]]:
    """A client on its own demo copy, the active version's id and a stored draft's id."""
    path = copy_demo(demo_file, tmp_path_factory.mktemp("backtest") / "demo.db")
    with TestClient(create_app(settings_for(path))) as c:
        with c.app.state.database.transaction() as session:  # type: ignore[attr-defined]
            active = session.scalar(select(RulesetRow).where(RulesetRow.status == "active"))
            assert active is not None
            draft_id = store_draft(session=session, text=_variant(active.yaml_text),
                                   author="test", filename="variant.yaml")
            active_id = active.id
        yield c, active_id, draft_id


def _poll(client: TestClient, url: str) -> str:
    """The job page once it no longer reloads itself (bounded by POLL_SECONDS)."""
    deadline = time.monotonic() + POLL_SECONDS
    while True:
        page = client.get(url)
        assert page.status_code == 200, page.text[:300]
        if 'http-equiv="refresh"' not in page.text:
            return page.text
        assert time.monotonic() < deadline, "backtest did not finish in time"
        time.sleep(0.2)


def test_backtest_start_refused_for_viewer(client_ids: tuple[TestClient, int, int]) -> None:
    client, _active, draft = client_ids
    login(client, ROLE_USER["viewer"])
    csrf = csrf_of(client.get("/staff/policies").text)
    answer = client.post(f"/staff/policies/{draft}/backtest", data={"csrf": csrf},
                         follow_redirects=False)
    assert answer.status_code == 403


def test_backtest_job_page_refused_for_viewer(client_ids: tuple[TestClient, int, int]) -> None:
    client, _active, _draft = client_ids
    login(client, ROLE_USER["viewer"])
    assert client.get("/staff/policies/backtests/nosuchjob").status_code == 403


def test_backtest_start_refused_without_csrf(client_ids: tuple[TestClient, int, int]) -> None:
    client, _active, draft = client_ids
    login(client, ROLE_USER["analyst"])
    answer = client.post(f"/staff/policies/{draft}/backtest", data={"csrf": "forged"},
                         follow_redirects=False)
    assert answer.status_code == 403


def test_backtest_unknown_job_is_404(client_ids: tuple[TestClient, int, int]) -> None:
    client, _active, _draft = client_ids
    login(client, ROLE_USER["analyst"])
    assert client.get("/staff/policies/backtests/nosuchjob").status_code == 404


def test_backtest_unknown_version_is_404(client_ids: tuple[TestClient, int, int]) -> None:
    client, _active, _draft = client_ids
    login(client, ROLE_USER["analyst"])
    csrf = csrf_of(client.get("/staff/policies").text)
    answer = client.post("/staff/policies/99999/backtest", data={"csrf": csrf},
                         follow_redirects=False)
    assert answer.status_code == 404


def test_policies_page_offers_backtest_to_analyst(
    client_ids: tuple[TestClient, int, int],
) -> None:
    client, active, draft = client_ids
    login(client, ROLE_USER["analyst"])  # the active version is preselected for comparison
    page = client.get(f"/staff/policies?id={draft}").text
    assert f'action="/staff/policies/{draft}/backtest"' in page
    selected = re.search(r'<option value="(\d+)" selected>', page)
    assert selected is not None
    assert selected.group(1) == str(active)


def test_backtest_unknown_compare_version_is_404(
    client_ids: tuple[TestClient, int, int],
) -> None:
    client, _active, draft = client_ids
    login(client, ROLE_USER["analyst"])
    csrf = csrf_of(client.get("/staff/policies").text)
    answer = client.post(f"/staff/policies/{draft}/backtest",
                         data={"csrf": csrf, "compare": "99999"}, follow_redirects=False)
    assert answer.status_code == 404


@pytest.fixture(scope="module")
def finished_run(client_ids: tuple[TestClient, int, int]) -> tuple[str, str]:
    """The job page's address and result of a backtest of the draft beside the active one."""
    client, active, draft = client_ids
    login(client, ROLE_USER["analyst"])
    csrf = csrf_of(client.get(f"/staff/policies?id={draft}").text)
    answer = client.post(f"/staff/policies/{draft}/backtest",
                         data={"csrf": csrf, "compare": str(active)}, follow_redirects=False)
    assert answer.status_code == 303
    location = answer.headers["location"]
    assert location.startswith("/staff/policies/backtests/")
    return location, _poll(client, location)


@pytest.fixture(scope="module")
def finished(finished_run: tuple[str, str]) -> str:
    return finished_run[1]


def _service_summaries(client: TestClient, ids: tuple[int, ...]) -> list[object]:
    out = []
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        for rid in ids:
            row = session.get(RulesetRow, rid)
            assert row is not None
            out.append(run_backtest(session=session, ruleset=parsed(row)).summary)
    return out


def test_backtest_result_names_both_rulesets(
    client_ids: tuple[TestClient, int, int], finished: str
) -> None:
    assert "The backtest failed" not in finished
    assert "county-demo 2031.77" in finished  # the draft
    assert "county-demo 2031.2" in finished  # the active version (rules/policies/county.yaml)


def test_backtest_result_figures_equal_service_summary(
    client_ids: tuple[TestClient, int, int], finished: str
) -> None:
    client, active, draft = client_ids
    expected = _service_summaries(client, (draft, active))
    want_changes = [f"{s.changes_per_year:.1f}" for s in expected]  # type: ignore[attr-defined]
    got_changes = re.findall(r'data-figure="changes_per_year">([^<]*)<', finished)
    assert got_changes == want_changes
    want_esc = [str(s.escalations) for s in expected]  # type: ignore[attr-defined]
    assert re.findall(r'data-figure="escalations">([^<]*)<', finished) == want_esc
    for k in range(len(expected[0].tier_shares)):  # type: ignore[attr-defined]
        want = [f"{100 * s.tier_shares[k]:.1f}%" for s in expected]  # type: ignore[attr-defined]
        got = re.findall(rf'data-figure="share_{k}">([0-9.]+%)', finished)
        assert got == want, k


def test_policies_page_lists_finished_backtest(
    client_ids: tuple[TestClient, int, int], finished_run: tuple[str, str]
) -> None:
    client = client_ids[0]
    login(client, ROLE_USER["analyst"])
    recent = client.get("/staff/policies").text
    assert re.search(rf'href="{finished_run[0]}">[^<]*</a>: done', recent)


def test_backtest_result_strip_has_one_row_per_district(
    client_ids: tuple[TestClient, int, int], finished: str
) -> None:
    client = client_ids[0]
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        n = session.scalar(select(func.count()).select_from(Region).where(
            Region.level == "district"))
    svgs = re.findall(r'<svg class="tier-strip".*?</svg>', finished, flags=re.S)
    assert len(svgs) == 2
    for svg in svgs:
        rows = re.findall(r'<g class="strip-row" data-region="([^"]+)"', svg)
        assert len(rows) == n
        assert len(set(rows)) == n


def test_backtest_progress_then_failure_shown(
    client_ids: tuple[TestClient, int, int], monkeypatch: pytest.MonkeyPatch
) -> None:
    """A running job reloads itself and shows days done / total; a failure names its cause."""
    client, _active, draft = client_ids
    release = threading.Event()

    def stalled(*, progress: Callable[[int], None], **_kw: object) -> NoReturn:
        progress(10)
        release.wait(POLL_SECONDS)
        raise ValueError("invented failure for the test")

    monkeypatch.setattr(backtest_jobs, "run_backtest", stalled)
    login(client, ROLE_USER["analyst"])
    csrf = csrf_of(client.get(f"/staff/policies?id={draft}").text)
    location = client.post(f"/staff/policies/{draft}/backtest", data={"csrf": csrf},
                           follow_redirects=False).headers["location"]
    deadline = time.monotonic() + POLL_SECONDS
    while 'value="10"' not in (page := client.get(location).text):
        assert time.monotonic() < deadline, "progress never reached 10 days"
        time.sleep(0.05)
    assert '<meta http-equiv="refresh" content="2">' in page
    assert re.search(r"10 of (\d+)", page) is not None
    release.set()
    final = _poll(client, location)
    assert "invented failure for the test" in final


def test_backtest_as_known_equals_service_summary(
    client_ids: tuple[TestClient, int, int],
) -> None:
    """The as-known replay (vintages) is the one run, not the latest-data one."""
    client, _active, draft = client_ids
    login(client, ROLE_USER["analyst"])
    csrf = csrf_of(client.get(f"/staff/policies?id={draft}").text)
    location = client.post(f"/staff/policies/{draft}/backtest",
                           data={"csrf": csrf, "compare": "", "as_known": "1"},
                           follow_redirects=False).headers["location"]
    page = _poll(client, location)
    assert "the data as known each day" in page
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        row = session.get(RulesetRow, draft)
        assert row is not None
        want = run_backtest(session=session, ruleset=parsed(row), as_known=True,
                            time_zone=client.app.state.settings.zone).summary  # type: ignore[attr-defined]
    got = re.findall(r'data-figure="share_(\d+)">([0-9.]+%)', page)
    assert got == [(str(k), f"{100 * x:.1f}%") for k, x in enumerate(want.tier_shares)]


def test_backtest_poll_answered_by_another_worker(
    client_ids: tuple[TestClient, int, int], finished_run: tuple[str, str]
) -> None:
    """A second app on the same database (another worker process) shows the finished job."""
    client, _active, _draft = client_ids
    settings = client.app.state.settings  # type: ignore[attr-defined]
    with TestClient(create_app(settings)) as other:
        login(other, ROLE_USER["analyst"])
        page = other.get(finished_run[0])
        assert page.status_code == 200
        assert "county-demo 2031.77" in page.text
        assert 'http-equiv="refresh"' not in page.text
        assert re.findall(r'data-figure="changes_per_year">([^<]*)<', page.text) == \
            re.findall(r'data-figure="changes_per_year">([^<]*)<', finished_run[1])
