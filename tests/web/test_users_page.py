"""Users page: a notice after every change, no Disable or role change on the admin's own row,
names unique regardless of case; Policies: a draft that is not UTF-8 is refused with its place."""

from __future__ import annotations

import html
import re

import pytest
from fastapi.testclient import TestClient

from tests.web.conftest import csrf_of, login


@pytest.fixture(scope="module")
def admin(demo_app_client: TestClient) -> TestClient:
    assert login(demo_app_client, "ines.admin") == 303
    return demo_app_client


def _notice(text: str) -> str:
    found = re.search(r'<p class="notice" role="status">([^<]*)</p>', text)
    assert found is not None, "no notice on the page"
    return html.unescape(found.group(1))


def test_each_change_says_what_was_done(admin: TestClient) -> None:
    csrf = csrf_of(admin.get("/staff/users").text)
    added = admin.post("/staff/users", data={"csrf": csrf, "name": "nora.notice",
                                             "role": "viewer", "password": "a-long-password"})
    assert added.status_code == 200
    assert _notice(added.text) == "Added nora.notice."
    role = admin.post("/staff/users/nora.notice/role", data={"csrf": csrf, "role": "analyst"})
    assert _notice(role.text).startswith("Changed the role of nora.notice to analyst")
    off = admin.post("/staff/users/nora.notice/active", data={"csrf": csrf, "active": "no"})
    assert _notice(off.text).startswith("Disabled nora.notice")
    on = admin.post("/staff/users/nora.notice/active", data={"csrf": csrf, "active": "yes"})
    assert _notice(on.text).startswith("Enabled nora.notice")
    pw = admin.post("/staff/users/nora.notice/password",
                    data={"csrf": csrf, "password": "another-long-one"})
    assert _notice(pw.text).startswith("Set a new password for nora.notice")


def test_plain_users_page_has_no_notice_and_forged_notices_are_ignored(admin: TestClient) -> None:
    assert 'class="notice"' not in admin.get("/staff/users").text
    forged = admin.get("/staff/users", params={"done": "<b>x</b>", "name": "ines.admin"}).text
    assert 'class="notice"' not in forged
    unknown = admin.get("/staff/users", params={"done": "added", "name": "nobody.here"}).text
    assert 'class="notice"' not in unknown


def test_own_row_offers_no_disable_and_no_role_change(admin: TestClient) -> None:
    page = admin.get("/staff/users").text
    assert 'action="/staff/users/ines.admin/role"' not in page
    assert 'action="/staff/users/ines.admin/active"' not in page
    assert 'action="/staff/users/ines.admin/password"' in page
    assert 'action="/staff/users/vic.viewer/role"' in page  # other rows keep them
    assert 'action="/staff/users/vic.viewer/active"' in page


def test_users_table_scrolls_inside_a_wrapper(admin: TestClient) -> None:
    page = admin.get("/staff/users").text
    assert '<div class="scroll"><table class="grid compact users">' in page


def test_name_in_other_case_is_refused_and_login_ignores_case(admin: TestClient) -> None:
    csrf = csrf_of(admin.get("/staff/users").text)
    first = admin.post("/staff/users", data={"csrf": csrf, "name": "tess.trainee",
                                             "role": "viewer", "password": "a-long-password"})
    assert first.status_code == 200
    again = admin.post("/staff/users", data={"csrf": csrf, "name": "Tess.Trainee",
                                             "role": "viewer", "password": "a-long-password"})
    assert again.status_code == 422
    assert "already exists" in html.unescape(again.text)
    assert admin.get("/staff/users").text.count("<th scope=\"row\">tess.trainee") == 1
    assert login(admin, "Tess.Trainee", "a-long-password") == 303
    assert login(admin, "ines.admin") == 303


@pytest.mark.parametrize(("raw", "line", "offset"), [
    ("name: Demo\n# Übergang\n".encode("latin-1"), 2, 13),
    (b"\xef\xbb\xbfname: x\n\xe9\n", 2, 11),
])
def test_policy_draft_not_in_utf8_is_refused_with_line_and_byte(
    admin: TestClient, raw: bytes, line: int, offset: int
) -> None:
    csrf = csrf_of(admin.get("/staff/policies").text)
    answer = admin.post("/staff/policies/draft", data={"csrf": csrf, "store": "1"},
                        files={"file": ("draft.yaml", raw, "application/yaml")})
    assert answer.status_code == 422
    text = html.unescape(answer.text)
    assert f"draft.yaml: line {line}, byte {offset}: the file is not valid UTF-8" in text
    assert f"(byte 0x{raw[offset]:02x})" in text
    assert "\ufffd" not in text


def test_policy_draft_in_utf8_with_a_bom_is_read(admin: TestClient) -> None:
    csrf = csrf_of(admin.get("/staff/policies").text)
    answer = admin.post("/staff/policies/draft", data={"csrf": csrf},
                        files={"file": ("d.yaml", b"\xef\xbb\xbfname: [unclosed\n",
                                        "application/yaml")})
    assert "not valid UTF-8" not in answer.text  # decoded; the YAML error is another matter
    assert "d.yaml" in html.unescape(answer.text)
