"""German staff pages beyond the GET pages of ``test_german_pages``: the pages reached by a form
(upload receipt, an upload held for confirmation, a finished backtest), the policy's own texts
(scenario labels, prepare-signal messages, tier guidance: ``translations`` in the policy) and
the office's clock (every time a staff page shows is in ``TIERWISE_TIME_ZONE`` with the zone's
abbreviation).

References: Central European Time is UTC+1 and Central European Summer Time UTC+2, summer time
running from 01:00 UTC on the last Sunday of March to 01:00 UTC on the last Sunday of October
(Directive 2000/84/EC of the European Parliament and of the Council, Articles 2 and 3); the
zone data are the IANA tz database's ``Europe/Berlin`` read through Python's ``zoneinfo``.
"""

from __future__ import annotations

import re
import time
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from demo_seed.feeds import DEMO_FEEDS_FILE
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_ruleset
from server.store.models import Ruleset as RulesetRow
from server.store.models import User, Vintage
from tests.web.conftest import ROLE_USER, copy_demo, csrf_of, login, settings_for
from tests.web.test_german_pages import _english_patterns, _Text
from web.app import create_app
from web.templating import local_time
from web.words import policy_words

BERLIN = ZoneInfo("Europe/Berlin")


@pytest.fixture(scope="module")
def client(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    path = copy_demo(demo_file, tmp_path_factory.mktemp("german-staff") / "demo.db")
    settings = settings_for(path, feeds_file=DEMO_FEEDS_FILE, time_zone="Europe/Berlin")
    with TestClient(create_app(settings)) as c:
        yield c


def _nodes(html: str) -> list[str]:
    parser = _Text()
    parser.feed(html)
    return parser.nodes


def _catalog_leaks(html: str) -> list[tuple[str, str]]:
    patterns = _english_patterns()
    return sorted({(msgid, node) for node in _nodes(html) for msgid, rx in patterns
                   if rx.fullmatch(node)})


def _policy_texts(client: TestClient) -> dict[str, str]:
    """The active policy's English texts that have a German translation."""
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        row = active_ruleset(session=session)
        assert row is not None
        return policy_words(parsed(row), "de")


def _policy_leaks(html: str, texts: dict[str, str]) -> list[str]:
    """English policy texts (scenario labels, signal messages, tier names and guidance) on a
    German page; a signal message with ``{reading}`` is matched with any reading."""
    shown = " ".join(_nodes(html))
    out = []
    for english in texts:
        if "{reading}" in english:
            before, _, after = english.partition("{reading}")
            if re.search(re.escape(before) + ".+?" + re.escape(after), shown):
                out.append(english)
        elif re.search(r"(?<![\w-])" + re.escape(english) + r"(?![\w-])", shown):
            out.append(english)
    return out


def test_the_demo_policy_translates_scenarios_signals_and_guidance(client: TestClient) -> None:
    texts = _policy_texts(client)
    assert texts["if the trend continues"] == "bei gleichem Trend"
    assert texts["The lower bound of Rt has been over 1 for 5 days."].startswith("Die Untergrenze")
    assert "Routine surveillance; weekly review." in texts
    assert len(texts) >= 20


POLICY_PAGES = [("/staff/", "viewer"), ("/staff/district/D13", "viewer"),
                ("/staff/areas/R1/capacity", "viewer"), ("/staff/policies", "analyst"),
                ("/staff/district/D13/explain", "viewer")]


@pytest.mark.parametrize(("path", "role"), POLICY_PAGES, ids=[p for p, _ in POLICY_PAGES])
def test_no_policy_text_stays_english_on_a_german_page(
    client: TestClient, path: str, role: str
) -> None:
    login(client, ROLE_USER[role])
    answer = client.get(path, params={"lang": "de"})
    assert answer.status_code == 200, answer.text[:300]
    assert _policy_leaks(answer.text, _policy_texts(client)) == []
    english = client.get(path, params={"lang": "en"}).text
    if path.endswith("capacity"):  # the check can fail: the English page shows the labels
        assert "if the trend continues" in english


def _upload(client: TestClient, body: str, *, dry_run: bool) -> str:
    login(client, ROLE_USER["analyst"])
    csrf = csrf_of(client.get("/staff/feeds").text)
    data = {"csrf": csrf, "feed": "long-csv", **({"dry_run": "true"} if dry_run else {})}
    answer = client.post("/staff/feeds/upload", params={"lang": "de"}, data=data,
                         files={"file": ("hand.csv", body.encode(), "text/csv")})
    assert answer.status_code == (200 if dry_run else 409), answer.text[:300]
    return answer.text


def test_upload_receipt_is_german(client: TestClient) -> None:
    html = _upload(client, "region,date,measure,value\nD01,2026-11-28,cases,77\n"
                           "D01,2026-11-29,cases,abc\n", dry_run=True)
    assert _catalog_leaks(html) == []
    nodes = _nodes(html)
    assert "Bestätigte Fälle" in nodes  # the measure by its German label
    assert "Wert 'abc' ist keine Zahl" in nodes  # the rejected row's reason, value as sent


def test_upload_held_for_confirmation_is_german(client: TestClient) -> None:
    html = _upload(client, "region,date,measure,value\nD01,2026-11-28,tests,999\n",
                   dry_run=False)
    assert 'class="confirm-upload"' in html  # held: it revises lab-drop's value
    assert _catalog_leaks(html) == []
    assert "Durchgeführte Tests" in _nodes(html)


def test_finished_backtest_page_is_german(client: TestClient) -> None:
    login(client, ROLE_USER["analyst"])
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        active = session.scalar(select(RulesetRow.id).where(RulesetRow.status == "active"))
    csrf = csrf_of(client.get("/staff/policies").text)
    started = client.post(f"/staff/policies/{active}/backtest", data={"csrf": csrf},
                          follow_redirects=False)
    assert started.status_code == 303
    url = started.headers["location"]
    deadline = time.monotonic() + 60
    while 'http-equiv="refresh"' in (page := client.get(url, params={"lang": "de"})).text:
        assert time.monotonic() < deadline, "backtest did not finish in time"
        time.sleep(0.2)
    assert "Stufen unter" in page.text
    assert _catalog_leaks(page.text) == []
    assert _policy_leaks(page.text, _policy_texts(client)) == []
    cells = re.findall(r'<td data-figure="changes_per_year">([^<]*)</td>', page.text)
    assert cells and all(re.fullmatch(r"\d+,\d", c) for c in cells)  # decimal comma


# -- the office's clock ------------------------------------------------------------------------

def test_local_time_uses_the_zone_abbreviation_in_winter_and_summer() -> None:
    # Directive 2000/84/EC: CET (UTC+1) in winter, CEST (UTC+2) from the last Sunday of March
    winter = datetime(2026, 12, 1, 5, 30, tzinfo=UTC)
    summer = datetime(2026, 7, 1, 5, 30, tzinfo=UTC)
    assert local_time(winter, BERLIN, "en") == "2026-12-01 06:30 CET"
    assert local_time(winter, BERLIN, "de") == "01.12.2026 06:30 CET"
    assert local_time(summer, BERLIN, "de") == "01.07.2026 07:30 CEST"
    assert local_time(winter, BERLIN, "de", written=False) == "2026-12-01 06:30 CET"
    # the switch itself: 2026-03-29 01:00 UTC is 03:00 CEST, a minute before 01:59 CET
    assert local_time(datetime(2026, 3, 29, 1, 0, tzinfo=UTC), BERLIN, "en").endswith(
        "03:00 CEST")
    assert local_time(datetime(2026, 3, 29, 0, 59, tzinfo=UTC), BERLIN, "en").endswith(
        "01:59 CET")
    assert local_time(None, BERLIN, "de") == "—"


def _newest_delivery(client: TestClient, feed: str) -> datetime:
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        at = session.scalar(select(Vintage.received_at).where(Vintage.feed == feed)
                            .order_by(Vintage.received_at.desc()).limit(1))
    assert at is not None
    return at


@pytest.mark.parametrize("lang", ["de", "en"])
def test_staff_pages_show_deliveries_in_the_office_time_zone(
    client: TestClient, lang: str
) -> None:
    at = _newest_delivery(client, "long-csv")
    assert (at.hour, at.minute) == (5, 30)  # the demo's morning push, 05:30 UTC in December
    assert at.astimezone(BERLIN).utcoffset().total_seconds() == 3600  # type: ignore[union-attr]
    day = at.date().isoformat()
    login(client, ROLE_USER["analyst"])
    for path in ("/staff/", "/staff/feeds"):  # tables write the day in ISO order in any language
        text = client.get(path, params={"lang": lang}).text
        assert f"<td>{day} 06:30 CET" in text, (path, lang)
        assert "05:30 UTC" not in text, (path, lang)


def test_users_policies_review_and_explanations_use_the_office_clock(client: TestClient) -> None:
    login(client, ROLE_USER["admin"])
    with client.app.state.database.transaction() as session:  # type: ignore[attr-defined]
        created = session.scalar(select(User.created_at).where(User.name == ROLE_USER["admin"]))
    assert created is not None
    users = client.get("/staff/users", params={"lang": "de"}).text
    assert local_time(created, BERLIN, "en", written=False) in users
    zone_times = re.compile(r"\d{2}:\d{2} (?:CET|CEST)\b")
    for path in ("/staff/", "/staff/policies", "/staff/review", "/staff/district/D01/explain",
                 "/staff/feeds", "/staff/users"):
        text = client.get(path, params={"lang": "de"}).text
        assert zone_times.search(text), path
        assert not re.search(r"\d{2}:\d{2} UTC\b", text), path


def test_engine_sentences_of_held_and_lowered_days_in_german() -> None:
    # sentences as rules/explanation.py writes them (held on confirmation days, a lowering with
    # an inactive criterion of a fractional count), read through the shipped German catalog
    from web.i18n import load_catalogs
    from web.words import translate_sentence

    gettext = load_catalogs().translations["de"].gettext
    held = ("Held at Heightened (1): 4 of 5 confirmation days so far for High (2) (7-day "
            "incidence 330 (230–471) per 100 000 over the enter threshold 150 for 4 days).")
    assert translate_sentence(held, gettext, "de") == (
        "Gehalten bei Heightened (1): bisher 4 von 5 Bestätigungstagen für High (2) (7-day "
        "incidence 330 (230–471) je 100 000 seit 4 Tagen über der Eintrittsschwelle 150).")
    lowered = ("Lowered from High (2) to Baseline (0) on 2026-12-03: 7-day incidence 19 (8–42) "
               "per 100 000 inactive (count 11.5 under the minimum 20).")
    assert translate_sentence(lowered, gettext, "de", {"High": "Hoch", "Baseline": "Grundstufe",
                                                      "7-day incidence": "7-Tage-Inzidenz"}) == (
        "Herabgestuft von Hoch (2) auf Grundstufe (0) am 03.12.2026: 7-Tage-Inzidenz 19 (8–42) "
        "je 100 000 ausgesetzt (Fallzahl 11,5 unter dem Minimum 20).")
    assert translate_sentence(held, gettext, "en") == held
