"""Feed definition YAML: parsing, defaults and errors with file, line and key path."""

from __future__ import annotations

from datetime import timedelta
from pathlib import Path

import pytest

from server.feeds.definition import HttpSource, load_feeds, parse_duration, parse_feeds
from server.feeds.errors import FeedConfigError

DEMO = Path(__file__).resolve().parents[3] / "demo_seed" / "feeds.yaml"


def test_demo_feeds_have_long_csv_contract() -> None:
    feeds = load_feeds(DEMO)
    long_csv = feeds["long-csv"]
    assert (long_csv.format, long_csv.layout, long_csv.required_columns) == (
        "csv", "long", ["region", "date", "measure", "value"])


def test_demo_feeds_have_http_and_file_drop() -> None:
    kinds = {f.kind for f in load_feeds(DEMO)}
    assert {"http", "file", "push"} <= kinds


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        pytest.param("30m", timedelta(minutes=30), id="minutes"),
        pytest.param("36h", timedelta(hours=36), id="hours"),
        pytest.param("2w", timedelta(days=14), id="weeks"),
        pytest.param("0.5s", timedelta(milliseconds=500), id="fraction"),
    ],
)
def test_parse_duration_units(text: str, expected: timedelta) -> None:
    assert parse_duration(text) == expected


def test_parse_duration_rejects_words() -> None:
    with pytest.raises(ValueError, match="'soon' is not a duration"):
        parse_duration("soon")


def test_parse_feeds_error_names_line_and_key() -> None:
    text = "feeds:\n  - name: a\n    source: {kind: ftp}\n    measures: [cases]\n"
    with pytest.raises(FeedConfigError, match=r"f.yaml:3:\d+: feeds\[0\].source.kind: 'ftp'"):
        parse_feeds(text, source="f.yaml")


def test_parse_feeds_bad_cron_named() -> None:
    text = ("feeds:\n  - name: a\n    source: {kind: http, url: 'http://x/y'}\n"
            "    measures: [cases]\n    schedule: {cron: 'daily'}\n")
    with pytest.raises(FeedConfigError, match=r"schedule: cron needs 5 fields"):
        parse_feeds(text, source="f.yaml")


def test_parse_feeds_duplicate_name_refused() -> None:
    one = "  - name: a\n    source: {kind: push}\n    measures: [cases]\n"
    with pytest.raises(FeedConfigError, match="defined twice"):
        parse_feeds("feeds:\n" + one + one, source="f.yaml")


def test_parse_feeds_unknown_key_refused() -> None:
    text = "feeds:\n  - name: a\n    source: {kind: push}\n    measures: [cases]\n    colour: red\n"
    with pytest.raises(FeedConfigError, match=r"feeds\[0\].colour: unknown key"):
        parse_feeds(text, source="f.yaml")


def test_http_source_refuses_ftp_url() -> None:
    with pytest.raises(ValueError, match="url must start with http"):
        HttpSource(url="ftp://x/y")


def test_push_feed_with_schedule_refused() -> None:
    text = ("feeds:\n  - name: a\n    source: {kind: push}\n    measures: [cases]\n"
            "    schedule: {interval: 1h}\n")
    with pytest.raises(FeedConfigError, match="a push feed has no schedule"):
        parse_feeds(text, source="f.yaml")


def test_decimal_and_thousands_read_from_yaml() -> None:
    text = ("feeds:\n  - name: a\n    source: {kind: push}\n    measures: [cases]\n"
            "    delimiter: ';'\n    decimal: ','\n    thousands: '.'\n")
    feed = parse_feeds(text, source="f.yaml")["a"]
    assert (feed.decimal, feed.thousands) == (",", ".")


@pytest.mark.parametrize(
    ("extra", "problem"),
    [
        pytest.param("    decimal: ':'\n", "decimal ':' must be", id="bad-mark"),
        pytest.param("    decimal: ','\n    thousands: ','\n", "cannot both be", id="same"),
        pytest.param("    thousands: '_'\n", "thousands '_' must be one of", id="bad-thousands"),
        pytest.param("    format: json\n    decimal: ','\n", "apply to CSV feeds", id="json"),
    ],
)
def test_decimal_settings_refused_with_key(extra: str, problem: str) -> None:
    text = "feeds:\n  - name: a\n    source: {kind: push}\n    measures: [cases]\n" + extra
    with pytest.raises(FeedConfigError, match=rf"f.yaml:2:\d+: feeds\[0\]: .*{problem}"):
        parse_feeds(text, source="f.yaml")
