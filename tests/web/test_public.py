"""Public pages: published tiers only, nothing staff-only, small counts suppressed, cacheable."""

from __future__ import annotations

import numpy as np
import pytest
from fastapi.testclient import TestClient

from server.readmodels.pages import suppress_count, weekly_figures
from tests.server.conftest import seen
from tests.web.conftest import csrf_of, login

CODES = [f"D{i:02d}" for i in range(1, 15)]
STAFF_MARKERS = (
    "ada.analyst", "otto.approver", "ines.admin", "vic.viewer", "recommend", "pending",
    "rejected", "override", "SECRET-REASON-7731", "UNPUBLISHED-REASON-4410", "assessment",
)


def _public_routes() -> list[str]:
    routes = ["/", "/?lang=de", "/api/public/districts"]
    routes += [f"/district/{c}" for c in CODES] + [f"/api/public/districts/{c}" for c in CODES]
    return routes


def _assessment_of(client: TestClient, code: str) -> str:
    page = client.get("/staff/review")
    anchor = page.text.index(f'href="/staff/district/{code}"')
    form_at = page.text.index('action="/staff/review/', anchor)
    return page.text[form_at:].split('"')[1].rsplit("/", 1)[-1]


def _official(client: TestClient, assessment: str) -> dict[str, str]:
    """The official tier and decision of the assessment's district now, as a form shows them
    (D02's form is posted after the first publication decided it)."""
    with client.app.state.database.sessions() as s:  # type: ignore[attr-defined]
        now = seen(s, int(assessment))
    return {"official_tier": str(now["official_tier"] if now["official_tier"] is not None
                                 else "none"),
            "official_decision": str(now["official_decision_id"] or "none")}


def _decide(
    client: TestClient, *, code: str, tier: int, reason: str, assessment: str | None = None
) -> None:
    page = client.get("/staff/review")
    assessment = assessment or _assessment_of(client, code)
    answer = client.post(
        f"/staff/review/{assessment}",
        data={"csrf": csrf_of(page.text), "action": "override", "tier": str(tier),
              "reason": reason, **_official(client, assessment)},
        follow_redirects=False,
    )
    assert answer.status_code == 303, answer.text


D02_PUBLISHED: list[int] = []  # filled by the fixture: the tier published for D02


@pytest.fixture(scope="module")
def published(demo_app_client: TestClient) -> TestClient:
    """D01 overridden to tier 1 and published; then D02 decided at another tier than the one
    published for it, but not published (``D02_PUBLISHED`` holds the published one)."""
    client = demo_app_client
    assert login(client, "otto.approver") == 303
    d02 = _assessment_of(client, "D02")
    _decide(client, code="D01", tier=1, reason="SECRET-REASON-7731 agreed with the board")
    review = client.get("/staff/review")
    assert client.post("/staff/publish", data={"csrf": csrf_of(review.text)},
                       follow_redirects=False).status_code == 303
    shown = client.get("/api/public/districts/D02").json()["tier"]
    D02_PUBLISHED.append(shown)
    _decide(client, code="D02", tier=(shown + 1) % 4, reason="UNPUBLISHED-REASON-4410",
            assessment=d02)
    client.cookies.clear()
    return client


def test_public_routes_answer_without_login(published: TestClient) -> None:
    for route in _public_routes():
        assert published.get(route).status_code == 200, route


def test_public_routes_carry_nothing_staff_only(published: TestClient) -> None:
    for route in _public_routes():
        body = published.get(route).text.lower()
        for marker in STAFF_MARKERS:
            assert marker.lower() not in body, (route, marker)


def test_public_district_shows_published_override(published: TestClient) -> None:
    body = published.get("/api/public/districts/D01").json()
    assert body["tier"] == 1
    assert body["tier_name"] == "Heightened"


def test_public_district_ignores_unpublished_decision(published: TestClient) -> None:
    # D02 was published at its recommendation and then decided at another tier, unpublished.
    assert published.get("/api/public/districts/D02").json()["tier"] == D02_PUBLISHED[-1]


def test_public_index_names_every_district(published: TestClient) -> None:
    names = {d["name"] for d in published.get("/api/public/districts").json()}
    page = published.get("/").text
    assert len(names) == 14
    assert all(name in page for name in names)


def test_public_pages_carry_the_cautions(published: TestClient) -> None:
    for route in ["/", "/district/D03"]:
        text = published.get(route).text
        assert "responsible health authority under local law" in text
        assert "provisional" in text
        assert "&lt;10" in text


def test_public_page_answers_304_to_its_etag(published: TestClient) -> None:
    first = published.get("/district/D04")
    etag = first.headers["etag"]
    again = published.get("/district/D04", headers={"If-None-Match": etag})
    assert again.status_code == 304
    assert again.content == b""
    assert "last-modified" in first.headers
    assert first.headers["cache-control"].startswith("public")


def test_public_etag_differs_by_language(published: TestClient) -> None:
    en = published.get("/", headers={"accept-language": "en"}).headers["etag"]
    de = published.get("/", headers={"accept-language": "de"}).headers["etag"]
    assert en != de


def test_public_page_in_german(published: TestClient) -> None:
    text = published.get("/?lang=de").text
    assert '<html lang="de">' in text
    assert "Warnstufen nach Bezirk" in text
    # tier names and meanings from the policy's German translations (rules/policies/county.yaml)
    assert "Sehr hoch" in text and "Grundstufe" in text and "Severe" not in text
    district = published.get("/district/D03?lang=de").text
    assert "Die Infektionen" in district
    api = published.get("/api/public/districts", headers={"accept-language": "de"}).json()
    assert {d["tier_name"] for d in api if d["tier"] is not None} <= {
        "Grundstufe", "Erhöht", "Hoch", "Sehr hoch"}


def test_public_unknown_district_is_404(published: TestClient) -> None:
    answer = published.get("/district/NOPE")
    assert answer.status_code == 404
    assert "no district with code &#39;NOPE&#39;" in answer.text


def test_public_pages_send_a_strict_csp(published: TestClient) -> None:
    csp = published.get("/").headers["content-security-policy"]
    assert "script-src 'self'" in csp
    assert "unsafe-inline" not in csp.split("script-src")[1].split(";")[0]
    assert published.get("/").headers["x-frame-options"] == "DENY"


def test_public_pages_have_no_inline_script(published: TestClient) -> None:
    for route in ["/", "/district/D01"]:
        text = published.get(route).text
        assert "<script>" not in text and "onclick" not in text.lower()


@pytest.mark.parametrize(
    ("count", "text", "hidden"),
    [
        # Small-cell rule (health statistics, common practice): counts under 10 suppressed.
        pytest.param(0.0, "<10", True, id="zero"),
        pytest.param(9.0, "<10", True, id="nine"),
        pytest.param(10.0, "10", False, id="ten"),
        pytest.param(12345.0, "12\u202f345", False, id="thousands"),
        pytest.param(float("nan"), "—", True, id="missing"),
    ],
)
def test_suppress_count_below_threshold(count: float, text: str, hidden: bool) -> None:
    assert suppress_count(count, 10) == (text, hidden)


def test_weekly_figures_withhold_rates_of_small_counts() -> None:
    daily = np.array([1.0] * 7 + [3.0] * 7)  # 7 cases, then 21 cases
    dates = np.arange(np.datetime64("2026-03-01"), np.datetime64("2026-03-15"))
    weeks = weekly_figures(daily, dates, 50_000.0, 10)
    assert [w.count_text for w in weeks] == ["<10", "21"]
    assert weeks[0].rate is None
    # 21 cases in 50 000 people = 42 per 100 000.
    assert weeks[1].rate == pytest.approx(42.0)


def test_weekly_figures_treat_a_missing_day_as_unknown_week() -> None:
    daily = np.array([5.0] * 6 + [np.nan])
    dates = np.arange(np.datetime64("2026-03-01"), np.datetime64("2026-03-08"))
    (week,) = weekly_figures(daily, dates, 1000.0, 10)
    assert week.count_text == "—"
    assert week.rate is None


def test_suppress_count_refuses_a_zero_threshold() -> None:
    with pytest.raises(ValueError, match="threshold must be >= 1, got 0"):
        suppress_count(5.0, 0)


@pytest.mark.parametrize(
    ("delay_days", "expected"),
    [
        # Reporting-delay window (common practice, no source): a week holding any of the last
        # ``delay_days`` days is provisional. Weeks end on 03-07, 03-14 and 03-21.
        pytest.param(7, [False, False, True], id="one-week-window"),
        pytest.param(8, [False, True, True], id="window-reaches-back-into-second-week"),
        pytest.param(0, [False, False, False], id="no-window"),
    ],
)
def test_weekly_figures_mark_weeks_inside_the_delay_window(
    delay_days: int, expected: list[bool]
) -> None:
    daily = np.full(21, 20.0)
    dates = np.arange(np.datetime64("2026-03-01"), np.datetime64("2026-03-22"))
    weeks = weekly_figures(daily, dates, 100_000.0, 10, delay_days=delay_days)
    assert [w.provisional for w in weeks] == expected


def test_weekly_figures_keep_the_reported_rate_of_a_provisional_week() -> None:
    daily = np.array([30.0] * 7 + [2.0] * 7)  # 210 cases, then 14 reported so far
    dates = np.arange(np.datetime64("2026-03-01"), np.datetime64("2026-03-15"))
    weeks = weekly_figures(daily, dates, 100_000.0, 10)
    assert weeks[-1].provisional
    # 14 cases in 100 000 people = 14 per 100 000: what has been reported, not inflated.
    assert weeks[-1].rate == pytest.approx(14.0)
    assert weeks[-1].count_text == "14"


def test_weekly_figures_refuse_a_negative_delay_window() -> None:
    with pytest.raises(ValueError, match="delay_days must be >= 0, got -1"):
        weekly_figures(np.ones(7), np.arange(np.datetime64("2026-03-01"),
                                             np.datetime64("2026-03-08")), 1000.0, 10,
                       delay_days=-1)


def test_public_json_marks_only_the_newest_week_provisional(published: TestClient) -> None:
    weeks = published.get("/api/public/districts/D03").json()["weeks"]
    assert [w["provisional"] for w in weeks] == [False] * (len(weeks) - 1) + [True]


def test_public_district_page_labels_the_provisional_week(published: TestClient) -> None:
    text = published.get("/district/D03").text
    assert text.count("provisional: late reports still arriving") == 1
    assert 'class="provisional"' in text


def test_public_district_page_labels_the_provisional_week_in_german(
    published: TestClient,
) -> None:
    text = published.get("/district/D03?lang=de").text
    assert "vorläufig: Nachmeldungen treffen noch ein" in text


def test_public_times_are_shown_in_the_office_zone_with_its_name(published: TestClient) -> None:
    from datetime import datetime

    from web.app import local_time

    zone = published.app.state.settings.zone  # type: ignore[attr-defined]
    when = datetime.fromisoformat(published.get("/api/public/districts/D01").json()["published_at"])
    page = published.get("/district/D01").text
    assert f'<time datetime="{when.isoformat()}">{local_time(when, zone)}</time>' in page
    index = published.get("/").text
    assert "Last published: " + local_time(when, zone)[:10] in index


def test_local_time_uses_the_zone_and_names_it() -> None:
    from datetime import UTC, date, datetime
    from zoneinfo import ZoneInfo

    from web.app import local_time

    berlin = ZoneInfo("Europe/Berlin")
    # IANA tz database: Central European Time is UTC+1 in winter and UTC+2 (CEST) from the last
    # Sunday of March to the last Sunday of October (EU Directive 2000/84/EC).
    assert local_time(datetime(2026, 11, 30, 5, 30, tzinfo=UTC), berlin) == "2026-11-30 06:30 CET"
    assert local_time(datetime(2026, 7, 1, 22, 15, tzinfo=UTC), berlin) == "2026-07-02 00:15 CEST"
    assert local_time(date(2026, 11, 13), berlin) == "2026-11-13"
    assert local_time(None, berlin) == "—"


def test_since_dates_do_not_break(published: TestClient) -> None:
    page = published.get("/").text
    assert '<td class="date"><time datetime="' in page


@pytest.mark.parametrize("route", ["/", "/district/D01", "/api/public/districts",
                                   "/api/public/districts/D01"])
def test_public_pages_answer_head(published: TestClient, route: str) -> None:
    got, head = published.get(route), published.head(route)
    assert head.status_code == 200
    assert head.content == b""
    assert head.headers["etag"] == got.headers["etag"]


def test_favicon_is_ours_and_linked(published: TestClient) -> None:
    page = published.get("/").text
    assert '<link rel="icon" type="image/svg+xml" href="' in page
    icon = published.get("/static/favicon.svg")
    assert icon.status_code == 200
    assert icon.headers["content-type"].startswith("image/svg+xml")
    assert "<title>tierwise</title>" in icon.text
    legacy = published.get("/favicon.ico", follow_redirects=False)
    assert legacy.status_code == 301
    assert legacy.headers["location"] == "/static/favicon.svg"
