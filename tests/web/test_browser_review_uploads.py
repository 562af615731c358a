"""Browser tests of issue 16, items 2 and 3: decisions and uploads as people use them.

Playwright driving Debian's Chromium against uvicorn on its own copy of the demo database, with
the demo's feed file. Screenshots go to ``test-artifacts/`` like the other browser tests.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from demo_seed.feeds import DEMO_FEEDS_FILE
from server.config import Settings
from server.services.database import Database
from server.services.official_history import import_official_history, read_official_history
from tests.web.conftest import copy_demo
from tests.web.test_browser import (  # noqa: F401 - fixtures used by name
    ARTIFACTS,
    browser,
    page,
    serving,
    shot,
    sign_in,
)

pytestmark = [pytest.mark.browser, pytest.mark.slow]


@pytest.fixture(scope="module")
def server(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    path = copy_demo(demo_file, tmp_path_factory.mktemp("browser16") / "demo.db")
    # an office history from before tierwise (docs/decisions.md): decisions with no assessment
    csv = ("region,effective_date,tier,reason,decided_by,decided_at\n"
           "D14,2026-10-15,2,Weekly meeting: step up agreed,otto.approver,"
           "2026-10-14T15:00:00+00:00\n"
           "D14,2026-11-05,3,Weekly meeting: step up agreed,,2026-11-04T15:00:00+00:00\n")
    db = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
    try:
        with db.transaction() as session:
            import_official_history(session=session, source="past.csv", actor="test",
                                    records=read_official_history("past.csv", csv))
    finally:
        db.dispose()
    with serving(path, TIERWISE_FEEDS_FILE=str(DEMO_FEEDS_FILE)) as base:
        yield base


def test_override_without_tier_keeps_the_reason_then_decides(server: str, page) -> None:  # type: ignore[no-untyped-def]  # noqa: F811
    sign_in(page, server, "otto.approver")
    page.goto(server + "/staff/review")
    card = page.locator("article.pending-card").first
    district = card.locator("h3 a").inner_text()
    reason = "Cluster in one care home, contained; keep the tier for now"
    card.locator("textarea").fill(reason)
    card.locator("button[value=override]").click()  # no tier chosen
    card = page.locator("article.pending-card", has_text=district).first
    alert = card.locator("p.error-message[role=alert]")
    assert "an override needs a tier" in alert.inner_text()
    assert card.locator("textarea").input_value() == reason
    shot(page, "20-review-override-without-tier")
    card.screenshot(path=str(ARTIFACTS / "20b-review-card-kept-reason.png"))
    card.locator("select[name=tier]").select_option("1")
    card.locator("button[value=override]").click()
    page.wait_for_url(re.compile(r".*/staff/review$"))
    row = page.locator("#hist-h ~ div table tbody tr").first
    cells = row.locator("td").all_inner_texts()
    # Decided, Tier, Recommended, Kind, Who, Why, Effective, Published (district is a th)
    assert cells[2].strip() not in ("", "—")
    assert cells[3] == "overridden"
    tomorrow = (datetime.now(UTC) + timedelta(days=1)).date().isoformat()
    assert cells[6] == tomorrow  # the demo policy: effective_delay_days 1
    # every decision says what was recommended, the imported ones (no assessment) too
    recommended = page.locator("#hist-h ~ div table tbody tr td:nth-child(4)").all_inner_texts()
    assert len(recommended) == 3 and all(r.strip() not in ("", "—") for r in recommended)
    shot(page, "21-review-history-after-override")
    page.locator("section[aria-labelledby=hist-h]").screenshot(
        path=str(ARTIFACTS / "21b-review-history-section.png"))
    page.goto(server + "/staff/")
    changes = page.locator("#changes-h + ul.changes").inner_text()
    assert f"{district}: overridden to" in changes and "not yet published" in changes
    shot(page, "22-overview-changes-with-override")
    page.locator("section[aria-labelledby=changes-h]").screenshot(
        path=str(ARTIFACTS / "22b-overview-changes-panel.png"))


def test_upload_asks_before_revising_another_feed_then_lists_revisions(
    server: str, page, tmp_path: Path,  # type: ignore[no-untyped-def]  # noqa: F811
) -> None:
    one_row = tmp_path / "hand-count.csv"
    one_row.write_text("region,date,measure,value\nD01,2026-11-29,tests,4321\n")
    sign_in(page, server, "ada.analyst")
    page.goto(server + "/staff/feeds")
    page.set_input_files("input[name=file]", str(one_row))
    page.click("form[action='/staff/feeds/upload'] button[type=submit]")
    alert = page.locator("#confirm-h")
    assert "Nothing was stored yet." in alert.inner_text()
    first = page.locator("table tbody tr.other-feed").first.locator("td").all_inner_texts()
    assert first[:3] == ["D01", "tests", "2026-11-29"] and first[4] == "4321"
    assert first[5].startswith("lab-drop (another feed)")
    shot(page, "23-upload-asks-before-revising")
    page.click("form.confirm-upload button[type=submit]")
    assert "This vintage replaces 1 stored value" in page.locator("#revised-h + p").inner_text()
    shot(page, "24-upload-receipt-lists-revisions")


def test_feeds_page_shows_the_rejected_share(server: str, page, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]  # noqa: F811
    rows = ["region,date,measure,value", "D05,2026-12-01,cases,4"]
    rows += [f"D99,2026-12-01,cases,{k}" for k in range(9)]  # 9 of 10 rejected
    bad = tmp_path / "mostly-bad.csv"
    bad.write_text("\n".join(rows) + "\n")
    sign_in(page, server, "ada.analyst")
    page.goto(server + "/staff/feeds")
    page.set_input_files("input[name=file]", str(bad))
    page.click("form[action='/staff/feeds/upload'] button[type=submit]")
    page.goto(server + "/staff/feeds")
    line = page.locator("#h-status ~ div table tbody tr", has_text="long-csv")
    text = line.inner_text()
    assert "attention" in text and "too many rows rejected" in text and "90 %" in text
    shot(page, "25-feeds-rejected-share")
