"""Staff pages in German, the staff language switch, and the completeness of the catalogues.

The route tests read each staff page with ``?lang=de`` and look for a few German texts of the
de catalogue (and the absence of their English originals); the catalogue tests work on the files
in ``web/i18n``: the template ``messages.pot`` must list exactly what the templates use, and every
one of its messages needs a German translation with the same placeholders.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path
from urllib.parse import unquote

import pytest
from babel.messages.extract import extract_from_dir
from babel.messages.frontend import parse_mapping_cfg
from babel.messages.pofile import read_po
from fastapi.testclient import TestClient

from demo_seed.feeds import DEMO_FEEDS_FILE
from tests.web.conftest import ROLE_USER, copy_demo, csrf_of, login, settings_for
from web.app import create_app

WEB = Path(__file__).resolve().parents[2] / "web"
I18N = WEB / "i18n"
PLACEHOLDER = re.compile(r"%(?:\((\w+)\))?[sd%]")


@pytest.fixture(scope="module")
def client(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    path = copy_demo(demo_file, tmp_path_factory.mktemp("staff-i18n") / "demo.db")
    with TestClient(create_app(settings_for(path, feeds_file=DEMO_FEEDS_FILE))) as c:
        yield c


# (page, role, German texts that must appear, English texts that must not)
PAGES = [
    ("/staff/", "viewer", ["Morgenübersicht", "Geändert seit dem Vortag", "Datenquellen",
                           "Vorliegende Daten", "Kläranlagen", "Amtlich", "Anwenden"],
     ["Morning overview", "Changed since the previous day", "Data on hand"]),
    ("/staff/district/D01", "viewer", ["Stufenverlauf", "Korrekturen der jüngsten Fallzahlen",
                                       "Zeitraum anzeigen", "Prüfliste"],
     ["Tier timeline", "Revisions of recent cases", "Show period"]),
    ("/staff/district/D01/explain?day=2026-11-20", "viewer",
     ["Datenstand", "Kriterien", "Schwellenwerte: Eintritt / Austritt", "Zähler",
      "Was einen Wechsel zurückgehalten hat", "95-%-Intervall"],
     ["Data cutoff", "What held a change back", "Thresholds: enter / leave"]),
    ("/staff/review", "approver", ["Prüfliste", "Anstehende Änderungen", "Veröffentlichen",
                                   "Entscheidungsverlauf", "Begründung (Pflichtfeld)"],
     ["Review queue", "Decision history", "Reason (required)"]),
    ("/staff/feeds", "analyst", ["Zustand jeder eingerichteten Datenquelle", "Letzte Lieferung",
                                 "Datei hochladen", "Nur prüfen (nichts speichern)"],
     ["Upload a file", "Last vintage", "Check only"]),
    ("/staff/policies", "analyst", ["Regelwerke", "Schwellenwerte", "Versionen",
                                    "Entwurf prüfen", "Rückrechnung starten"],
     ["Thresholds</h3>", "Check a draft", "Run backtest"]),
    ("/staff/users", "admin", ["Benutzerkonten", "Benutzerkonto anlegen", "Rolle setzen",
                               "Passwort (mindestens 10 Zeichen)"],
     ["Add a user", "Set role"]),
]


@pytest.mark.parametrize(("path", "role", "german", "english"), PAGES,
                         ids=[p[0] for p in PAGES])
def test_staff_page_in_german(
    client: TestClient, path: str, role: str, german: list[str], english: list[str]
) -> None:
    assert login(client, ROLE_USER[role]) == 303
    answer = client.get(path, params={"lang": "de"})
    assert answer.status_code == 200, answer.text[:300]
    text = answer.text
    assert '<html lang="de">' in text
    for phrase in german + ["Abmelden", "Übersicht", "Öffentliche Ansicht"]:
        assert phrase in text, phrase
    for phrase in english + ["Sign out", "Decision support only"]:
        assert phrase not in text, phrase


def test_login_page_in_german(client: TestClient) -> None:
    client.cookies.clear()
    text = client.get("/staff/login", headers={"accept-language": "de-DE,de;q=0.9"}).text
    assert "Anmeldung für Mitarbeitende" in text
    assert "Benutzername" in text
    assert "Staff sign-in" not in text


def test_policy_diff_in_german(client: TestClient) -> None:
    login(client, ROLE_USER["viewer"])
    page = client.get("/staff/policies").text
    ids = sorted({int(i) for i in re.findall(r"/staff/policies\?id=(\d+)", page)})
    answer = client.get("/staff/policies/diff", params={"old": ids[0], "new": ids[0], "lang": "de"})
    assert answer.status_code == 200
    assert "Unterschiede zwischen zwei Versionen" in answer.text
    assert "Die beiden Versionen haben denselben Text." in answer.text


def test_upload_receipt_in_german_with_plural(client: TestClient) -> None:
    login(client, ROLE_USER["analyst"])
    csrf = csrf_of(client.get("/staff/feeds").text)
    body = b"region,date,measure,value\nD13,2026-11-20,cases,29\nD13,2026-11-21,cases,x\n"
    answer = client.post("/staff/feeds/upload?lang=de",
                         data={"csrf": csrf, "feed": "long-csv", "dry_run": "true"},
                         files={"file": ("w.csv", body, "text/csv")})
    assert answer.status_code in (200, 422), answer.text[:300]
    text = answer.text
    assert "Hochladen in long-csv" in text
    assert "Nur geprüft, nichts gespeichert:" in text
    assert "<strong>1</strong> Zeile übernommen, <strong>1</strong> abgelehnt." in text
    assert "Zurück zu den Datenquellen" in text


def test_english_stays_the_default(client: TestClient) -> None:
    login(client, ROLE_USER["viewer"])
    client.cookies.delete("tw_lang")
    text = client.get("/staff/", headers={"accept-language": "en"}).text
    assert "Morning overview" in text and "Morgenübersicht" not in text
    assert 'lang="de" hreflang="de">Deutsch</a>' in text


def test_staff_language_switch_remembers_the_choice_and_keeps_the_day(
    client: TestClient,
) -> None:
    login(client, ROLE_USER["viewer"])
    page = client.get("/staff/district/D01/explain?day=2026-11-20&lang=en").text
    link = re.search(r'<a href="/language\?next=([^&"]+)&amp;lang=de"', page)
    assert link is not None
    target = unquote(link.group(1))
    assert target == "/staff/district/D01/explain?day=2026-11-20"  # the query's lang is dropped
    answer = client.get("/language", params={"lang": "de", "next": target},
                        follow_redirects=False)
    assert answer.status_code == 303
    assert answer.headers["location"] == target
    assert client.cookies.get("tw_lang") == "de"
    again = client.get(target).text
    assert "Warum für" in again and "Datenstand" in again
    client.cookies.delete("tw_lang")


def _messages(path: Path) -> dict[object, object]:
    with path.open("rb") as fh:
        return {m.id: m.string for m in read_po(fh) if m.id}


def test_template_catalogue_lists_exactly_the_messages_of_the_templates() -> None:
    with (I18N / "babel.cfg").open() as fh:
        method_map, options_map = parse_mapping_cfg(fh)
    found = set()
    for _file, _line, message, _comments, _context in extract_from_dir(
        WEB, method_map, options_map
    ):
        found.add(message if isinstance(message, str) else message[:2])
    listed = {m if isinstance(m, str) else tuple(m) for m in _messages(I18N / "messages.pot")}
    assert found - listed == set(), "run pybabel extract (see web/i18n/__init__.py)"
    assert listed - found == set(), "messages.pot lists messages no template uses"


@pytest.mark.parametrize("lang", ["de", "en"])
def test_catalogue_has_the_messages_of_the_template(lang: str) -> None:
    template = _messages(I18N / "messages.pot")
    catalogue = _messages(I18N / lang / "LC_MESSAGES" / "messages.po")
    assert set(template) == set(catalogue)
    if lang == "en":  # the source language: an English msgstr would only hide the msgid
        assert [m for m, s in catalogue.items() if any([s] if isinstance(s, str) else s)] == []


def test_every_message_has_a_german_translation_with_the_same_placeholders() -> None:
    template = _messages(I18N / "messages.pot")
    german = _messages(I18N / "de" / "LC_MESSAGES" / "messages.po")
    missing = []
    for msgid in template:
        ids = [msgid] if isinstance(msgid, str) else list(msgid)  # type: ignore[call-overload]
        strings = german.get(msgid)
        strings = [strings] if isinstance(strings, str) else list(strings or [""])  # type: ignore[call-overload]
        if not all(strings):
            missing.append(msgid)
            continue
        wanted = sorted(PLACEHOLDER.findall(ids[-1]))
        for s in strings:
            got = sorted(PLACEHOLDER.findall(s))
            # a singular may leave out the count (German "eine Entscheidung"), never add one
            assert set(got) <= set(wanted) and (got == wanted or len(strings) > 1), (msgid, s)
    assert missing == []
