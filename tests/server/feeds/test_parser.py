"""Streaming CSV/JSON reading and row validation, including property-based checks."""

from __future__ import annotations

import io
from datetime import date

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_array_equal

from server.feeds.definition import parse_feeds
from server.feeds.errors import FeedFileError
from server.feeds.parser import read_chunks, sniff_delimiter
from server.feeds.validation import Accepted, Catalogue, check_file, day_numbers, validate_chunk

FEEDS = parse_feeds(
    "feeds:\n  - name: long-csv\n    source: {kind: push}\n    measures: [cases, tests]\n"
    "  - name: weekly\n    source: {kind: push}\n    cadence: weekly\n    measures: [cases]\n",
    source="t.yaml",
)
CAT = Catalogue(regions={"A": 1, "B": 2}, measures={"cases": 1, "tests": 2},
                counts=frozenset({"cases", "tests"}))
TODAY = date(2026, 6, 1)


def chunks(content: bytes, block: int = 1 << 20, feed: str = "long-csv"):  # type: ignore[no-untyped-def]
    return list(read_chunks(io.BytesIO(content), FEEDS[feed], label="f.csv", block_bytes=block))


@pytest.mark.parametrize(
    ("header", "expected"),
    [pytest.param("a,b;c", ",", id="tie-comma"), pytest.param("a;b;c", ";", id="semicolon"),
     pytest.param("a\tb", "\t", id="tab"), pytest.param("abc", ",", id="none")],
)
def test_sniff_delimiter(header: str, expected: str) -> None:
    assert sniff_delimiter(header) == expected


def test_read_chunks_line_numbers_survive_small_blocks() -> None:
    content = b"region,date,measure,value\r\n" + b"".join(
        f"A,2026-01-{d:02d},cases,{d}\r\n".encode() for d in range(1, 29))
    lines = np.concatenate([c.lines for c in chunks(content, block=37)])
    assert_array_equal(lines, np.arange(2, 30))


def test_read_chunks_multibyte_character_split_across_blocks() -> None:
    content = "region,date,measure,value\nA,2026-01-01,cases,1 \u00e9\n".encode()
    raw = np.concatenate([c.raw for c in chunks(content, block=5)])
    assert raw.tolist() == ["A,2026-01-01,cases,1 \u00e9"]


def test_read_chunks_extra_field_marks_row_malformed() -> None:
    (chunk,) = chunks(b"region,date,measure,value\nA,2026-01-01,cases,1\nA,1,2,3,4\n")
    assert chunk.malformed.tolist() == [False, True]


def test_read_chunks_nul_byte_rejected_with_offset() -> None:
    with pytest.raises(FeedFileError, match="byte 27"):
        chunks(b"region,date,measure,value\nA\x00")


def test_day_numbers_iso_week_only_for_weekly() -> None:
    text = np.asarray(["2026-W01", "2026-01-05", "2026-W54"], dtype=object)
    # ISO 8601: 2026-W01 starts Monday 29 December 2025; 2026 has 53 weeks at most.
    expected = (np.datetime64("2025-12-29") - np.datetime64("1970-01-01")).astype(int)
    got = day_numbers(text, weeks=True)
    assert got[0] == expected and np.isnan(got[2])
    assert np.isnan(day_numbers(text, weeks=False)[0])


def test_check_file_identical_duplicates_keep_first() -> None:
    a = Accepted(region_id=np.array([1, 1]), measure_id=np.array([1, 1]), day=np.array([5, 5]),
                 value=np.array([3.0, 3.0]), line=np.array([2, 3]))
    check = check_file(a, positives=None, tests=None)
    assert (check.keep.tolist(), check.reasons) == ([True, False], ("duplicate_row",))


ROWS = st.lists(
    st.tuples(
        st.sampled_from(["A", "B", "Z", "", " A "]),
        st.one_of(st.dates(date(2020, 1, 1), date(2030, 1, 1)).map(str), st.text(max_size=8)),
        st.sampled_from(["cases", "tests", "deaths", ""]),
        st.one_of(st.integers(-5, 10**6).map(str), st.floats(allow_nan=True).map(str),
                  st.text(max_size=6)),
    ),
    max_size=30,
)


@settings(max_examples=150, deadline=None)
@given(ROWS)
def test_validate_every_row_is_accepted_or_rejected(rows) -> None:  # type: ignore[no-untyped-def]
    text = "region,date,measure,value\n" + "".join(
        ",".join(f.replace(",", " ").replace("\n", " ").replace("\r", " ").replace('"', "")
                 .replace("\x00", " ") for f in r) + "\n" for r in rows)  # NUL: whole-file
    accepted = rejected = blank = 0
    for chunk in chunks(text.encode()):
        result = validate_chunk(chunk, FEEDS["long-csv"], CAT, today=TODAY)
        accepted += len(result.accepted)
        rejected += len(result.rejections)
        blank += result.skipped_blank
        assert np.isfinite(result.accepted.value).all()
        assert (result.accepted.day <= (TODAY - date(1970, 1, 1)).days).all()
    assert accepted + rejected + blank == len(rows)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=300))
def test_arbitrary_bytes_never_crash(content: bytes) -> None:
    try:
        for chunk in chunks(b"region,date,measure,value\n" + content, block=64):
            validate_chunk(chunk, FEEDS["long-csv"], CAT, today=TODAY)
    except FeedFileError:
        pass  # a clear rejection of the whole file is allowed; any other exception is a bug
