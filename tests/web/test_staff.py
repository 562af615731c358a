"""Staff routes for every role (allowed and refused), login, sessions and CSRF."""

from __future__ import annotations

import re

import pytest
from fastapi.testclient import TestClient

from server.services import auth
from server.services.auth import (
    PERMISSIONS,
    LoginLimiter,
    LoginRefusedError,
    StaffUser,
    authenticate,
    has_role,
    may,
)
from tests.web.conftest import ROLE_USER, csrf_of, login, seen_fields

PAGES = [
    ("/staff/", "viewer"),
    ("/staff/district/D01", "viewer"),
    ("/staff/district/D01/explain", "viewer"),
    ("/staff/district/D01/explain?day=2026-11-20", "viewer"),
    ("/staff/review", "viewer"),
    ("/staff/policies", "viewer"),
    ("/staff/users", "admin"),
]
ROLES = ("viewer", "analyst", "approver", "admin")
CASES = [
    pytest.param(path, role, has_role(role, needed), id=f"{path}-{role}")
    for path, needed in PAGES for role in ROLES
]


@pytest.mark.parametrize(("path", "role", "allowed"), CASES)
def test_staff_page_by_role(
    demo_app_client: TestClient, path: str, role: str, allowed: bool
) -> None:
    assert login(demo_app_client, ROLE_USER[role]) == 303
    answer = demo_app_client.get(path)
    assert answer.status_code == (200 if allowed else 403), answer.text[:300]


@pytest.mark.parametrize("path", [p for p, _ in PAGES])
def test_staff_page_without_login_redirects(demo_app_client: TestClient, path: str) -> None:
    demo_app_client.cookies.clear()
    answer = demo_app_client.get(path, follow_redirects=False)
    assert answer.status_code == 303
    assert answer.headers["location"].startswith("/staff/login?next=")


@pytest.mark.parametrize(
    ("role", "status"),
    [pytest.param("viewer", 403, id="viewer"), pytest.param("analyst", 403, id="analyst")],
)
def test_publish_refused_below_approver(
    demo_app_client: TestClient, role: str, status: int
) -> None:
    login(demo_app_client, ROLE_USER[role])
    csrf = csrf_of(demo_app_client.get("/staff/review").text)
    answer = demo_app_client.post("/staff/publish", data={"csrf": csrf})
    assert answer.status_code == status


def test_publish_refused_without_csrf(demo_app_client: TestClient) -> None:
    login(demo_app_client, "otto.approver")
    answer = demo_app_client.post("/staff/publish", data={"csrf": "forged"})
    assert answer.status_code == 403
    assert "security token" in answer.text


def test_decision_without_reason_is_refused(demo_app_client: TestClient) -> None:
    login(demo_app_client, "otto.approver")
    page = demo_app_client.get("/staff/review").text
    action = page.split('action="/staff/review/')[1].split('"')[0]
    answer = demo_app_client.post(
        f"/staff/review/{action}", data={"csrf": csrf_of(page), "action": "confirm",
                                          "reason": "  ", **seen_fields(page, action)})
    assert answer.status_code == 422
    assert "a decision needs a reason" in answer.text


def test_login_with_wrong_password_is_refused(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "vic.viewer", "wrong-password") == 401
    assert "tw_session" not in demo_app_client.cookies


def test_login_form_without_token_is_refused(demo_app_client: TestClient) -> None:
    demo_app_client.cookies.clear()
    answer = demo_app_client.post(
        "/staff/login", data={"name": "vic.viewer", "password": "demo-viewer"})
    assert answer.status_code == 403


def test_session_cookie_is_httponly_and_lax(demo_app_client: TestClient) -> None:
    demo_app_client.cookies.clear()
    form = demo_app_client.get("/staff/login").text
    token = form.split('name="login_token" value="')[1].split('"')[0]
    answer = demo_app_client.post(
        "/staff/login", data={"name": "vic.viewer", "password": "demo-viewer",
                              "login_token": token}, follow_redirects=False)
    cookie = answer.headers["set-cookie"]
    assert "tw_session=" in cookie
    assert "HttpOnly" in cookie
    assert "SameSite=lax" in cookie or "samesite=lax" in cookie.lower()


def test_tampered_session_cookie_is_ignored(demo_app_client: TestClient) -> None:
    demo_app_client.cookies.clear()
    demo_app_client.cookies.set("tw_session", "eyJ1IjoxfQ.forged.sig")
    answer = demo_app_client.get("/staff/", follow_redirects=False)
    assert answer.status_code == 303


def test_logout_ends_the_session(demo_app_client: TestClient) -> None:
    login(demo_app_client, "vic.viewer")
    csrf = csrf_of(demo_app_client.get("/staff/").text)
    assert demo_app_client.post("/staff/logout", data={"csrf": csrf},
                                follow_redirects=False).status_code == 303
    assert demo_app_client.get("/staff/", follow_redirects=False).status_code == 303


def test_overview_marks_pending_changes(demo_app_client: TestClient) -> None:
    login(demo_app_client, "ada.analyst")
    text = demo_app_client.get("/staff/?sort=pending").text
    assert "pending change" in text
    assert "Morning overview" in text


def test_overview_lists_newest_date_of_each_measure(demo_app_client: TestClient) -> None:
    # The staff home's contract: every district with the newest reference date of each measure.
    login(demo_app_client, "ada.analyst")
    text = demo_app_client.get("/staff/").text
    assert "Data on hand" in text
    # the column is named by the measure's description (demo_seed.scenario), its id kept beside
    assert "<th scope=\"col\">Hospital admissions with the infection</th>" in text
    assert "<th scope=\"col\">hosp_admissions</th>" not in text
    assert "<code>hosp_admissions</code>" in text
    assert "Haldenmoor <code>D11</code>" in text
    assert "Grennick Marsh <code>WW5</code>" in text


def test_overview_filters_by_search(demo_app_client: TestClient) -> None:
    login(demo_app_client, "ada.analyst")
    text = demo_app_client.get("/staff/?q=Vorwick").text
    assert "1 district" in text
    assert "Corvenstadt</a>" not in text


def test_overview_search_without_match_says_so(demo_app_client: TestClient) -> None:
    login(demo_app_client, "ada.analyst")
    text = demo_app_client.get("/staff/?q=Nowhere-at-all").text
    assert "0 districts" in text
    assert "No district matches “Nowhere-at-all”." in text


def test_overview_data_on_hand_is_rendered_once_per_vintage(demo_app_client: TestClient) -> None:
    login(demo_app_client, "ada.analyst")
    first = demo_app_client.get("/staff/").text
    second = demo_app_client.get("/staff/?q=Vorwick").text
    section = first[first.index('<section aria-labelledby="onhand-h">'):]
    assert section.split("</section>")[0] in second
    cache = demo_app_client.app.state.staff_fragments  # type: ignore[attr-defined]
    assert len(cache._items) == 1


def test_overview_lists_a_source_without_feed_definition(demo_app_client: TestClient) -> None:
    login(demo_app_client, "ada.analyst")
    text = demo_app_client.get("/staff/").text
    feeds = text[text.index('id="feeds-h"'):].split("</section>")[0]
    # the demo's data come through the demo feeds, which this client's settings do not configure
    assert "long-csv" in feeds and "not a configured feed" in feeds
    assert "late" not in feeds


def test_explanation_names_ruleset_and_thresholds(demo_app_client: TestClient) -> None:
    login(demo_app_client, "vic.viewer")
    text = demo_app_client.get("/staff/district/D01/explain").text
    assert "county-demo" in text
    assert "SHA-256" in text
    assert "Data cutoff" in text
    assert "per 100 000" in text


def test_draft_with_error_names_line_and_key(demo_app_client: TestClient) -> None:
    login(demo_app_client, "ada.analyst")
    csrf = csrf_of(demo_app_client.get("/staff/policies").text)
    draft = "name: broken\nversion: '1'\ntiers:\n  - name: Only\n"
    answer = demo_app_client.post(
        "/staff/policies/draft", data={"csrf": csrf, "text": draft})
    assert answer.status_code == 422
    assert "draft.yaml:" in answer.text


def test_draft_upload_refused_for_viewer(demo_app_client: TestClient) -> None:
    login(demo_app_client, "vic.viewer")
    csrf = csrf_of(demo_app_client.get("/staff/policies").text)
    answer = demo_app_client.post("/staff/policies/draft", data={"csrf": csrf, "text": "x"})
    assert answer.status_code == 403


def test_admin_adds_and_disables_a_user(demo_app_client: TestClient) -> None:
    login(demo_app_client, "ines.admin")
    csrf = csrf_of(demo_app_client.get("/staff/users").text)
    added = demo_app_client.post("/staff/users", data={
        "csrf": csrf, "name": "nia.newcomer", "role": "viewer", "password": "a-long-password"})
    assert added.status_code == 200
    assert "nia.newcomer" in added.text
    demo_app_client.post("/staff/users/nia.newcomer/active", data={"csrf": csrf, "active": "no"})
    assert login(demo_app_client, "nia.newcomer", "a-long-password") == 401


def test_login_is_rate_limited_per_user(demo_app_client: TestClient) -> None:
    codes = [login(demo_app_client, "ines.admin", "guess-" + str(i)) for i in range(6)]
    assert codes[:5] == [401] * 5
    assert codes[5] == 429
    form = demo_app_client.get("/staff/login")
    token = re.search(r'name="login_token" value="([^"]+)"', form.text)
    assert token is not None
    answer = demo_app_client.post("/staff/login", data={
        "name": "Ines.Admin", "password": "demo-admin", "login_token": token.group(1)})
    assert answer.status_code == 429
    assert re.search(r"too many failed logins for this user name from your address; try again "
                     r"in [45] min \d+ s \(at \d\d:\d\d:\d\d UTC\)", answer.text)


@pytest.mark.parametrize(
    ("role", "needed", "ok"),
    [
        pytest.param("admin", "approver", True, id="admin-approver"),
        pytest.param("analyst", "approver", False, id="analyst-approver"),
        pytest.param("viewer", "viewer", True, id="viewer-viewer"),
        pytest.param("nobody", "viewer", False, id="unknown-role"),
    ],
)
def test_has_role_orders_roles(role: str, needed: str, ok: bool) -> None:
    assert has_role(role, needed) is ok


@pytest.mark.parametrize(
    ("name", "hash_of"),
    [
        pytest.param("nobody.here", "dummy", id="unknown-user"),
        pytest.param("ada.analyst", "ada.analyst", id="known-user-wrong-password"),
    ],
)
def test_authenticate_runs_the_verifier_whether_or_not_the_user_exists(
    demo_app_client: TestClient, monkeypatch: pytest.MonkeyPatch, name: str, hash_of: str
) -> None:
    # Timing side channel (common practice, no source): both paths must run scrypt once.
    calls: list[str] = []
    real = auth.verify_password

    def recording(password: str, stored: str) -> bool:
        calls.append(stored)
        return real(password, stored)

    monkeypatch.setattr(auth, "verify_password", recording)
    db = demo_app_client.app.state.database  # type: ignore[attr-defined]
    with db.sessions() as session, pytest.raises(LoginRefusedError):
        authenticate(session=session, name=name, password="not-the-password",
                     limiter=LoginLimiter(db), client="test")
    assert len(calls) == 1
    assert calls[0].startswith("scrypt$")
    if hash_of == "dummy":
        assert calls[0] == auth._dummy_hash()


def test_overview_with_unknown_sort_key_is_422(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "ada.analyst") == 303
    answer = demo_app_client.get("/staff/?sort=bogus")
    assert answer.status_code == 422
    assert "sort must be one of pending, name, code, tier, recommended, got &#39;bogus&#39;" in (
        answer.text)


def test_district_page_with_start_after_end_is_422(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "ada.analyst") == 303
    answer = demo_app_client.get("/staff/district/D01?start=2030-01-01&end=2020-01-01")
    assert answer.status_code == 422
    assert "start 2030-01-01 is after end 2020-01-01" in answer.text


def test_draft_uploaded_as_a_file_is_read_and_checked(demo_app_client: TestClient) -> None:
    assert login(demo_app_client, "ada.analyst") == 303
    csrf = csrf_of(demo_app_client.get("/staff/policies").text)
    draft = b"name: broken\nversion: '1'\ntiers:\n  - name: Only\n"
    answer = demo_app_client.post("/staff/policies/draft", data={"csrf": csrf},
                                  files={"file": ("mine.yaml", draft, "application/yaml")})
    assert answer.status_code == 422
    assert "mine.yaml:" in answer.text


def test_feed_upload_reads_the_file_and_names_an_unknown_feed(
    demo_app_client: TestClient,
) -> None:
    assert login(demo_app_client, "ada.analyst") == 303
    csrf = csrf_of(demo_app_client.get("/staff/feeds").text)
    answer = demo_app_client.post(
        "/staff/feeds/upload", data={"csrf": csrf, "feed": "no-such-feed", "dry_run": "true"},
        files={"file": ("x.csv", b"region,date,measure,value\n", "text/csv")})
    assert answer.status_code == 422
    assert "unknown feed &#39;no-such-feed&#39;" in answer.text


def test_district_period_names_the_day_of_its_sentence_and_links_it(
    demo_app_client: TestClient,
) -> None:
    login(demo_app_client, "ada.analyst")
    text = demo_app_client.get("/staff/district/D04?start=2026-10-01&end=2026-10-20").text
    assert "On 2026-10-20 (the last day of the period shown):" in text
    assert 'href="/staff/district/D04/explain?day=2026-10-20">Explanation of 2026-10-20</a>' in text
    assert "Explanation of the newest day, 2026-11-30" in text



# The permission table (server.services.users.PERMISSIONS) is the one source of who may do what:
# every staff route that changes something admits exactly the roles its action names.
@pytest.mark.parametrize("action", sorted(PERMISSIONS))
@pytest.mark.parametrize("role", ROLES)
def test_may_follows_the_permission_table(role: str, action: str) -> None:
    assert may(role, action) is has_role(role, PERMISSIONS[action])
    assert StaffUser(id=1, name="x", role=role).may(action) is may(role, action)
    assert StaffUser(id=1, name="x", role=role, active=False).may(action) is False


def test_may_refuses_an_unknown_action() -> None:
    with pytest.raises(KeyError, match="unknown action"):
        may("admin", "launch")


def test_templates_ask_permissions_instead_of_listing_roles() -> None:
    from pathlib import Path

    root = Path(__file__).resolve().parents[2] / "web" / "templates"
    offenders = [
        str(path.relative_to(root)) for path in root.rglob("*.html")
        if "user.role ==" in path.read_text() or "user.role in" in path.read_text()
    ]
    assert offenders == []
