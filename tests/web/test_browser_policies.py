"""The morning overview with several active policies, in Chromium (marker ``browser``).

The invented demo county with its three policies (``several_policies_file``): the overview shows
a column per policy beside the lead policy's tiers, each cell with a tier and pending changes
flagged with their policy; the screenshot is kept under the test's tmp path.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.web.test_browser import ARGS, CHROMIUM, serving, sign_in, sync_api

pytestmark = [pytest.mark.browser, pytest.mark.slow]


@pytest.fixture(scope="module")
def server(several_policies_file: Path, tmp_path_factory: pytest.TempPathFactory
           ) -> Iterator[str]:
    path = tmp_path_factory.mktemp("browser-policies") / "demo.db"
    shutil.copyfile(several_policies_file, path)
    with serving(path) as base:
        yield base


def test_overview_shows_a_column_per_policy(server: str, tmp_path: Path) -> None:
    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        try:
            context = browser.new_context(viewport={"width": 1600, "height": 1000})
            page = context.new_page()
            errors: list[str] = []
            page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
            sign_in(page, server, "ada.analyst")
            heads = page.locator("table.overview th.policy-col")
            assert heads.count() == 2
            assert "county-influenza" in heads.nth(0).inner_text()
            assert "county-rsv" in heads.nth(1).inner_text()
            for name in ("county-influenza", "county-rsv"):
                cells = page.locator(f'td.policy-cell[data-policy="{name}"]')
                assert cells.count() == 14
                assert cells.locator(".swatch").count() >= 14  # a tier in every district
                assert cells.first.is_visible()
            lede = page.locator("p.policy-pending").inner_text()
            assert "county-demo (lead)" in lede and "county-rsv" in lede
            flagged = page.locator('td.policy-cell a.flag.pending')
            if flagged.count():  # a pending change of another policy leads to its queue
                href = flagged.first.get_attribute("href") or ""
                assert href.startswith("/staff/review?policy=county-")
            page.screenshot(path=str(tmp_path / "overview-policies.png"), full_page=True)
            assert (tmp_path / "overview-policies.png").stat().st_size > 10_000
            assert errors == []  # no script or CSP error
            context.close()
        finally:
            browser.close()
