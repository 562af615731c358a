"""Policies page: draft errors shown at the top, versions compared item by item."""

from __future__ import annotations

import html
import re

from fastapi.testclient import TestClient

from tests.web.conftest import csrf_of, login


def test_draft_error_is_shown_at_the_top_and_the_form_is_the_target(
    demo_app_client: TestClient,
) -> None:
    login(demo_app_client, "ada.analyst")
    page = demo_app_client.get("/staff/policies").text
    assert 'action="/staff/policies/draft#draft-h"' in page
    draft = "name: broken\nversion: '1'\ntiers:\n  - name: Only\n"
    answer = demo_app_client.post("/staff/policies/draft",
                                  data={"csrf": csrf_of(page), "text": draft})
    assert answer.status_code == 422
    top = answer.text.index("<h1>")
    alert = answer.text.index('class="error-message" role="alert"')
    assert alert > top and alert < answer.text.index('id="active-h"')


def test_policy_diff_page_compares_item_by_item(demo_app_client: TestClient) -> None:
    login(demo_app_client, "ada.analyst")
    page = demo_app_client.get("/staff/policies").text
    yaml_text = re.search(r'<pre class="yaml">(.*?)</pre>', page, flags=re.S)
    assert yaml_text is not None
    text = html.unescape(yaml_text.group(1))
    variant = re.sub(r"^version: .*$", 'version: "2031.77"', text, count=1, flags=re.M)
    variant = variant.replace("release_days: 28", "release_days: 21", 1)
    stored = demo_app_client.post("/staff/policies/draft", data={
        "csrf": csrf_of(page), "text": variant, "store": "1"}, follow_redirects=False)
    assert stored.status_code in (200, 303)
    ids = sorted({int(i) for i in re.findall(r"/staff/policies\?id=(\d+)",
                                             demo_app_client.get("/staff/policies").text)})
    diff = demo_app_client.get("/staff/policies/diff", params={"old": ids[0], "new": ids[-1]})
    assert diff.status_code == 200
    assert "What changed" in diff.text
    row = re.search(r"Days to confirm a fall</th><td class=\"del\">(\d+)</td><td class=\"add\">"
                    r"(\d+)</td>", diff.text)
    assert row is not None and row.groups() == ("28", "21")


def test_draft_with_a_bad_indicator_declaration_names_line_and_key(
    demo_app_client: TestClient,
) -> None:
    login(demo_app_client, "ada.analyst")
    page = demo_app_client.get("/staff/policies").text
    yaml_text = re.search(r'<pre class="yaml">(.*?)</pre>', page, flags=re.S)
    assert yaml_text is not None
    text = html.unescape(yaml_text.group(1)).replace(
        "  gp_aberration:\n", "  adm_14d:\n    label: admissions\n    kind: incidence\n"
        "    measure: hosp_admissions\n    params: {window: 400}\n  gp_aberration:\n")
    line = text.splitlines().index("    params: {window: 400}") + 1
    answer = demo_app_client.post("/staff/policies/draft",
                                  data={"csrf": csrf_of(page), "text": text, "store": "1"})
    assert answer.status_code == 422
    assert (f"draft.yaml:{line}:22: indicators.adm_14d.params.window: 400 is above the maximum "
            "366") in html.unescape(answer.text)
