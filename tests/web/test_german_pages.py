"""German pages are German throughout: no catalog message left in English, numbers and dates in
the German form.

The leak test renders the main staff and public pages of the demo with ``?lang=de`` and reads
their visible text (text nodes and the ``title``, ``aria-label``, ``placeholder`` and ``alt``
attributes). Every message of the German catalog whose translation differs from its English
msgid is a pattern (placeholders match any text); a text node that is such a message in English
means a template or a Python-built word (``web/words.py``) skipped the catalog. Messages with
markup cannot match one text node and are left out; names a policy writes (tiers, indicators)
are not catalog messages and are not checked here.

References for the formats: the decimal comma and the grouping symbol of German are CLDR's
(Unicode CLDR, locale ``de``, numbers/symbols; read through Babel); digits grouped in threes by a
narrow space in every language follow ISO 80000-1:2009, 7.3.1 ("the digits may be separated into
groups of three by a small space; neither a point nor a comma"); the numeric German date
``TT.MM.JJJJ`` is DIN 5008:2020, section "Datum" (from memory).
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from datetime import UTC, date, datetime
from html.parser import HTMLParser
from pathlib import Path

import pytest
from babel.messages.pofile import read_po
from babel.numbers import get_decimal_symbol, get_group_symbol
from fastapi.testclient import TestClient

from demo_seed.feeds import DEMO_FEEDS_FILE
from tests.web.conftest import ROLE_USER, copy_demo, login, settings_for
from web.app import create_app
from web.templating import GROUP, format_day, format_number
from web.words import translate_sentence

I18N = Path(__file__).resolve().parents[2] / "web" / "i18n"
PLACEHOLDER = re.compile(r"%(?:\(\w+\))?[sd]")


def test_german_numbers_use_the_decimal_comma_and_a_narrow_space_for_thousands() -> None:
    # CLDR de: decimal symbol "," and group symbol "."; the group symbol is replaced by the
    # narrow space of ISO 80000-1 in both languages
    assert get_decimal_symbol("de") == "," and get_group_symbol("de") == "."
    assert format_number(209.9, 1, "de") == "209,9"
    assert format_number(209.9, 1, "en") == "209.9"
    assert format_number(12345.25, 2, "de") == f"12{GROUP}345,25"
    assert format_number(1234567.0, 0, "de") == f"1{GROUP}234{GROUP}567"
    assert format_number(1234567.0, 0, "en") == f"1{GROUP}234{GROUP}567"
    assert format_number(-0.5, 1, "de") == "-0,5"


def test_german_dates_in_sentences_and_iso_elsewhere() -> None:
    assert format_day(date(2026, 11, 20), "de") == "20.11.2026"  # DIN 5008 numeric form
    assert format_day(date(2026, 11, 20), "en") == "2026-11-20"  # ISO 8601
    assert format_day(datetime(2026, 12, 1, 5, 30, tzinfo=UTC), "de") == "01.12.2026 05:30 UTC"
    assert format_day(None, "de") == "—"


def test_engine_sentence_patterns_in_german() -> None:
    german = {
        "Stays at %(tier)s (%(n)s):": "Bleibt bei %(tier)s (%(n)s):",
        "lower bound under %(value)s": "Untergrenze unter %(value)s",
        "under %(value)s": "unter %(value)s",
        "per 100 000": "je 100 000",
    }
    sentence = ("Stays at Baseline (0): 7-day incidence 41 (31–56) per 100 000, lower bound "
                "under 75; positivity 1.5% under 6%.")
    out = translate_sentence(sentence, lambda m: german.get(m, m), "de")
    assert out == ("Bleibt bei Baseline (0): 7-day incidence 41 (31–56) je 100 000, "
                   "Untergrenze unter 75; positivity 1,5% unter 6%.")
    assert translate_sentence(sentence, lambda m: german.get(m, m), "en") == sentence


class _Text(HTMLParser):
    """Visible text nodes and the readable attributes of a page."""

    SKIP = {"script", "style", "code", "pre", "textarea"}
    ATTRS = {"title", "aria-label", "placeholder", "alt"}

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.nodes: list[str] = []
        self._skip = 0

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag in self.SKIP:
            self._skip += 1
        for name, value in attrs:
            if name in self.ATTRS and value and value.strip():
                self.nodes.append(" ".join(value.split()))

    def handle_endtag(self, tag: str) -> None:
        if tag in self.SKIP:
            self._skip = max(0, self._skip - 1)

    def handle_data(self, data: str) -> None:
        text = " ".join(data.split())
        if text and not self._skip:
            self.nodes.append(text)


def _english_patterns() -> list[tuple[str, re.Pattern[str]]]:
    with (I18N / "de" / "LC_MESSAGES" / "messages.po").open("rb") as fh:
        catalog = read_po(fh)
    out = []
    for m in catalog:
        if not m.id:
            continue
        ids = [m.id] if isinstance(m.id, str) else list(m.id)
        strings = [m.string] if isinstance(m.string, str) else list(m.string)
        for i, msgid in enumerate(ids):
            german = strings[min(i, len(strings) - 1)]
            if "<" in msgid or not german or german == msgid:
                continue
            parts = PLACEHOLDER.split(msgid.replace("%%", "%"))
            literal = re.sub(r"[^A-Za-z]", "", "".join(parts))
            if len(parts) > 1 and len(literal) < 10:
                continue  # "%(when)s by %(who)s" would match any text with " by " in it
            body = ".+?".join(re.escape(re.sub(r"\s+", " ", p)) for p in parts)
            out.append((msgid, re.compile(body)))
    return out


@pytest.fixture(scope="module")
def client(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    path = copy_demo(demo_file, tmp_path_factory.mktemp("german-pages") / "demo.db")
    with TestClient(create_app(settings_for(path, feeds_file=DEMO_FEEDS_FILE,
                                             time_zone="Europe/Berlin"))) as c:
        yield c


PAGES = [
    ("/", None), ("/district/D01", None),
    ("/staff/", "viewer"), ("/staff/district/D01", "viewer"),
    ("/staff/district/D01/explain?day=2026-11-20", "viewer"),
    ("/staff/review", "approver"), ("/staff/feeds", "analyst"),
    ("/staff/policies", "analyst"), ("/staff/users", "admin"),
    ("/staff/areas/R1/capacity", "viewer"), ("/staff/effects", "analyst"),
    ("/staff/district/D13", "viewer"), ("/staff/feeds?feed=long-csv", "analyst"),
    ("/staff/district/D01/explain", "viewer"),
    ("/staff/district/D01/explain?day=2026-11-20&effects=1", "viewer"),
    ("/staff/district/R1", "viewer"), ("/staff/district/C0", "viewer"),
]


@pytest.mark.parametrize(("path", "role"), PAGES, ids=[p for p, _ in PAGES])
def test_no_catalog_message_stays_english_on_a_german_page(
    client: TestClient, path: str, role: str | None
) -> None:
    if role is None:
        client.cookies.clear()
    else:
        assert login(client, ROLE_USER[role]) == 303
    answer = client.get(path, params={"lang": "de"})
    assert answer.status_code == 200, answer.text[:300]
    parser = _Text()
    parser.feed(answer.text)
    patterns = _english_patterns()
    assert len(patterns) > 500  # the catalog was read
    leaks = sorted({(msgid, node) for node in parser.nodes for msgid, rx in patterns
                    if rx.fullmatch(node)})
    assert leaks == [], leaks


def test_german_staff_numbers_have_the_decimal_comma(client: TestClient) -> None:
    login(client, ROLE_USER["viewer"])
    text = client.get("/staff/district/D01/explain?day=2026-11-20", params={"lang": "de"}).text
    cells = re.findall(r'<td class="num">([^<]*)</td>', text)
    assert cells
    assert [c for c in cells if re.search(r"\d\.\d", c)] == []
    assert any(re.search(r"\d,\d", c) for c in cells)
    english = client.get("/staff/district/D01/explain?day=2026-11-20", params={"lang": "en"}).text
    assert any(re.search(r"\d\.\d", c)
               for c in re.findall(r'<td class="num">([^<]*)</td>', english))
