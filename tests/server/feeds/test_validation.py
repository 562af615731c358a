"""Row checks agree with the indicators on what a count is; hostile numbers and JSON.

A count is stored as a whole number: within ``COUNT_TOLERANCE`` of one it is rounded to it, beyond
it the row is ``non_integer_count``; a count above 2**53 or a value the scale makes infinite is
``out_of_range``. JSON nested past Python's recursion limit or with integers longer than the
4 300 digits ``int()`` accepts is bad input with the record's place, never a crash.
"""

from __future__ import annotations

import io
from datetime import date

import numpy as np
import pytest

from server.feeds.definition import parse_feeds
from server.feeds.errors import FeedFileError
from server.feeds.parser import read_chunks
from server.feeds.validation import MAX_COUNT, Catalogue, validate_chunk
from server.indicators.poisson import incidence_rate

FEEDS = parse_feeds(
    "feeds:\n  - name: long-csv\n    source: {kind: push}\n    measures: [cases, ww_flow]\n"
    "  - name: scaled\n    source: {kind: push}\n"
    "    measures: {ww_flow: {scale: 1.0e10}}\n"
    "  - name: j\n    source: {kind: push}\n    format: json\n    measures: [cases]\n",
    source="t.yaml",
)
CAT = Catalogue(regions={"A": 1}, measures={"cases": 1, "ww_flow": 2},
                counts=frozenset({"cases"}))
TODAY = date(2026, 6, 1)


def check(text: str, feed: str = "long-csv"):  # type: ignore[no-untyped-def]
    (chunk,) = list(read_chunks(io.BytesIO(text.encode()), FEEDS[feed], label="f"))
    return validate_chunk(chunk, FEEDS[feed], CAT, today=TODAY)


@pytest.mark.parametrize(
    ("value", "stored"),
    [pytest.param("5.0000000001", 5.0, id="residue-above"),
     pytest.param("4.9999999999", 5.0, id="residue-below"),
     pytest.param("4.9e-324", 0.0, id="denormal"),
     pytest.param("-0", 0.0, id="negative-zero"),
     pytest.param("5", 5.0, id="whole")],
)
def test_count_within_tolerance_is_stored_as_the_whole_number(value: str, stored: float) -> None:
    result = check(f"region,date,measure,value\nA,2026-01-04,cases,{value}\n")
    assert result.rejections == []
    assert result.accepted.value.tolist() == [stored]
    assert str(result.accepted.value[0]) == str(stored)  # no -0.0
    # What validation stores is what the indicators take (they refuse any fraction).
    incidence_rate(result.accepted.value[np.newaxis, :], [1000], 1)


@pytest.mark.parametrize(
    ("value", "reason"),
    [pytest.param("5.5", "non_integer_count", id="half"),
     pytest.param("5.000001", "non_integer_count", id="past-tolerance"),
     pytest.param("-1e-10", "negative_count", id="tiny-negative"),
     pytest.param("1e300", "out_of_range", id="huge"),
     pytest.param(f"{int(MAX_COUNT) + 2}", "out_of_range", id="above-2**53")],
)
def test_count_that_is_not_a_storable_whole_number_is_rejected(value: str, reason: str) -> None:
    result = check(f"region,date,measure,value\nA,2026-01-04,cases,{value}\n")
    assert [(r.line, r.reason) for r in result.rejections] == [(2, reason)]
    assert len(result.accepted) == 0


def test_value_the_scale_makes_infinite_is_out_of_range() -> None:
    result = check("region,date,measure,value\nA,2026-01-04,ww_flow,1e300\n", feed="scaled")
    assert [r.reason for r in result.rejections] == ["out_of_range"]
    assert "times the scale 1e+10 is too large" in result.rejections[0].message


def test_level_measure_keeps_its_fraction() -> None:
    result = check("region,date,measure,value\nA,2026-01-04,ww_flow,4.9e-324\n")
    assert result.accepted.value.tolist() == [4.9e-324]


def json_chunks(content: bytes):  # type: ignore[no-untyped-def]
    return list(read_chunks(io.BytesIO(content), FEEDS["j"], label="f.json"))


def test_json_nested_past_the_recursion_limit_names_the_record() -> None:
    deep = b"[" * 5000 + b"]" * 5000
    content = (b'[{"region": "A", "date": "2026-01-04", "measure": "cases", "value": 1},\n'
               b'{"region": "A", "extra": ' + deep + b"}]")
    with pytest.raises(FeedFileError, match=r"f.json: record 2, line 2 column 1: the JSON is "
                                            r"nested too deeply"):
        json_chunks(content)


def test_json_integer_of_5000_digits_is_a_rejected_value_not_a_crash() -> None:
    digits = b"7" * 5000
    content = (b'[{"region": "A", "date": "2026-01-04", "measure": "cases", "value": ' + digits
               + b'},\n{"region": "A", "date": "2026-01-05", "measure": "cases", "value": 3}]')
    (chunk,) = json_chunks(content)
    result = validate_chunk(chunk, FEEDS["j"], CAT, today=TODAY)
    assert [(r.line, r.reason) for r in result.rejections] == [(1, "non_numeric_value")]
    assert result.accepted.value.tolist() == [3.0]


def test_json_integers_keep_their_digits_as_values() -> None:
    (chunk,) = json_chunks(b'[{"region": "A", "date": "2026-01-04", "measure": "cases", '
                           b'"value": 12}]')
    assert chunk.columns["value"].values.tolist() == ["12"]


@pytest.mark.parametrize(
    ("day", "reason"),
    [pytest.param("0001-01-01", "date_too_old", id="year-1"),
     pytest.param("1989-12-31", "date_too_old", id="day-before-floor"),
     pytest.param("9999-12-31", "future_date", id="year-9999"),
     pytest.param("2026-02-30", "unparsable_date", id="no-such-day")],
)
def test_dates_far_out_are_rejected(day: str, reason: str) -> None:
    result = check(f"region,date,measure,value\nA,{day},cases,1\nA,1990-01-01,cases,2\n")
    assert [(r.line, r.reason) for r in result.rejections] == [(2, reason)]
    assert result.accepted.line.tolist() == [3]
