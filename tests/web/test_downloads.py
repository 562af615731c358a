"""Public downloads (CSV/JSON with a data dictionary), Atom feeds, and the district outlook."""

from __future__ import annotations

import csv
import io
from datetime import datetime
from xml.etree import ElementTree as ET

import pytest
from fastapi.testclient import TestClient

from tests.web.test_public import STAFF_MARKERS, published  # noqa: F401 (fixture)

ATOM = "{http://www.w3.org/2005/Atom}"
TABLES = ("tiers", "tier_changes", "weekly_cases")


@pytest.fixture(scope="module")
def client(published: TestClient) -> TestClient:  # noqa: F811
    """The demo with every district published once (and D01 overridden), signed out."""
    return published


@pytest.mark.parametrize("name", TABLES)
def test_download_csv_header_matches_data_dictionary(client: TestClient, name: str) -> None:
    answer = client.get(f"/data/{name}.csv")
    assert answer.status_code == 200
    assert answer.headers["content-type"].startswith("text/csv")
    header = next(csv.reader(io.StringIO(answer.text)))
    dictionary = client.get("/data/dictionary.json").json()
    assert header == [f["name"] for f in dictionary[name]]


@pytest.mark.parametrize("name", TABLES)
def test_download_json_has_the_same_records_as_csv(client: TestClient, name: str) -> None:
    rows = list(csv.DictReader(io.StringIO(client.get(f"/data/{name}.csv").text)))
    body = client.get(f"/data/{name}.json").json()
    assert body["table"] == name and len(body["records"]) == len(rows) > 0

    def text(v: object) -> str:
        return "" if v is None else ("true" if v is True else "false" if v is False else str(v))

    assert [{k: text(v) for k, v in r.items()} for r in body["records"]] == rows


@pytest.mark.parametrize("name", TABLES)
def test_download_carries_nothing_staff_only(client: TestClient, name: str) -> None:
    for fmt in ("csv", "json"):
        body = client.get(f"/data/{name}.{fmt}").text.lower()
        for marker in STAFF_MARKERS:
            assert marker.lower() not in body, (name, fmt, marker)


def test_download_weekly_cases_suppresses_small_counts(client: TestClient) -> None:
    rows = list(csv.DictReader(io.StringIO(client.get("/data/weekly_cases.csv").text)))
    for r in rows:
        if r["cases"].startswith("<"):
            assert r["cases"] == "<10" and r["rate_per_100k"] == ""
        elif r["cases"]:
            assert int(r["cases"].replace("\u202f", "")) >= 10


def test_download_unknown_table_is_refused(client: TestClient) -> None:
    assert client.get("/data/users.csv").status_code in (404, 422)
    assert client.get("/data/tiers.xml").status_code in (404, 422)


def _feed(client: TestClient, path: str) -> ET.Element:
    answer = client.get(path)
    assert answer.status_code == 200
    assert answer.headers["content-type"].startswith("application/atom+xml")
    return ET.fromstring(answer.content)


def _one(parent: ET.Element, tag: str) -> ET.Element:
    found = parent.findall(ATOM + tag)
    assert len(found) == 1, tag
    return found[0]


@pytest.mark.parametrize("path", ["/feeds/tiers.atom", "/feeds/district/D03.atom"])
def test_atom_feed_has_the_elements_rfc4287_requires(client: TestClient, path: str) -> None:
    # RFC 4287 section 4.1.1: a feed has exactly one id, title and updated, and an author
    # unless every entry has one; section 4.1.2: each entry exactly one id, title, updated;
    # dates are RFC 3339 (section 3.3).
    feed = _feed(client, path)
    assert feed.tag == ATOM + "feed"
    for tag in ("id", "title", "updated"):
        _one(feed, tag)
    assert feed.findall(ATOM + "author/" + ATOM + "name")
    assert any(link.get("rel") == "self" and link.get("href", "").endswith(path)
               for link in feed.findall(ATOM + "link"))
    entries = feed.findall(ATOM + "entry")
    assert entries
    for e in entries:
        for tag in ("id", "title", "updated"):
            _one(e, tag)
        datetime.fromisoformat(_one(e, "updated").text.replace("Z", "+00:00"))
    ids = [_one(e, "id").text for e in entries]
    assert len(set(ids)) == len(ids)


def test_atom_feed_ids_are_stable_and_follow_published_changes(client: TestClient) -> None:
    first = _feed(client, "/feeds/tiers.atom")
    second = _feed(client, "/feeds/tiers.atom")
    ids = [e.findtext(ATOM + "id") for e in first.findall(ATOM + "entry")]
    assert ids == [e.findtext(ATOM + "id") for e in second.findall(ATOM + "entry")]
    changes = list(csv.DictReader(io.StringIO(client.get("/data/tier_changes.csv").text)))
    assert len(ids) == min(len(changes), 200)


def test_atom_feed_of_unknown_district_is_404(client: TestClient) -> None:
    assert client.get("/feeds/district/NOPE.atom").status_code == 404


def test_public_district_page_says_what_would_change_the_tier(client: TestClient) -> None:
    page = client.get("/district/D03").text
    assert "What would change this tier" in page
    assert "The earliest date a step down could take effect" in page or "lowest tier" in page
    assert "What applies at this tier" in page
    assert "/feeds/district/D03.atom" in page


def test_public_district_page_in_german_shows_the_policy_texts_in_german(
    client: TestClient,
) -> None:
    page = client.get("/district/D03?lang=de").text
    assert "Was diese Stufe ändern würde" in page
    assert "What would change this tier" not in page


def test_data_page_lists_every_download_and_feed(client: TestClient) -> None:
    page = client.get("/data").text
    for name in TABLES:
        assert f"/data/{name}.csv" in page and f"/data/{name}.json" in page
    assert "/feeds/tiers.atom" in page
