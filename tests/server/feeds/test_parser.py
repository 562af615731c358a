"""Streaming CSV reading and its row validation, including property-based checks."""

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
from server.feeds.validation import Catalogue, validate_chunk

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


def test_read_chunks_first_row_with_extra_field_is_malformed_not_cut() -> None:
    # pandas warns (and drops the extra field) when the first row is the long one.
    (chunk,) = chunks(b"region,date,measure,value\nA,2026-01-01,cases,1,9\nA,2026-01-02,cases,2\n")
    assert chunk.malformed.tolist() == [True, False]


def test_quoted_field_with_line_break_is_one_record_numbered_where_it_starts() -> None:
    content = (b'region,date,measure,value\n"A",2026-01-01,cases,"1"\n'
               b'"B\nC",2026-01-02,cases,2\n'  # lines 3-4: one record, unknown region
               b'A,"2026-01-03",cases,"3"\r\n')
    (chunk,) = chunks(content)
    assert chunk.lines.tolist() == [2, 3, 5]
    assert chunk.raw.tolist()[1] == '"B\nC",2026-01-02,cases,2'
    result = validate_chunk(chunk, FEEDS["long-csv"], CAT, today=TODAY)
    assert result.accepted.line.tolist() == [2, 5]
    assert [(r.line, r.reason) for r in result.rejections] == [(3, "unknown_region")]
    assert result.rejections[0].message == "unknown region code 'B\\nC'"


def test_quote_never_closed_rejects_its_line_and_reading_resumes() -> None:
    content = b'region,date,measure,value\n"A,2026-01-01,cases,1\nA,2026-01-02,cases,2\n'
    rows = [(int(line), bool(bad)) for c in chunks(content) for line, bad in
            zip(c.lines, c.malformed, strict=True)]
    assert rows == [(2, True), (3, False)]


def test_quote_open_longer_than_the_record_limit_rejects_its_line() -> None:
    good = b"".join(f"A,2026-01-{d:02d},cases,{d}\n".encode() for d in range(2, 29))
    content = b'region,date,measure,value\n"A,2026-01-01,cases,1\n' + good + b'"\n'
    parts = list(read_chunks(io.BytesIO(content), FEEDS["long-csv"], label="f.csv",
                             block_bytes=16, max_record=64))
    lines = np.concatenate([c.lines for c in parts])
    malformed = np.concatenate([c.malformed for c in parts])
    assert lines[malformed].tolist() == [2, 30]  # the open quote, and the stray one at the end
    assert lines[~malformed].tolist() == list(range(3, 30))


def test_multiline_record_across_the_block_boundary_keeps_line_numbers() -> None:
    # A quoted region with two line breaks straddles the 8 MiB boundary of the reader's blocks;
    # the next record is bad and must be reported on its own first line.
    from server.feeds.parser import BLOCK_BYTES

    header = b"region,date,measure,value\n"
    row = b"A,2026-01-01,cases,1\n"
    filler = (BLOCK_BYTES - len(header) - 10) // len(row)
    head = header + row * filler
    assert len(head) < BLOCK_BYTES < len(head) + 30
    content = head + b'"A\n\nB",2026-01-02,cases,5\nA,2026-01-03,cases,-4\nB,2026-01-04,cases,1\n'
    parts = list(read_chunks(io.BytesIO(content), FEEDS["long-csv"], label="f.csv"))
    assert len(parts) == 2
    lines = np.concatenate([c.lines for c in parts])
    start = 2 + filler  # the quoted record's first line
    assert_array_equal(lines[-3:], [start, start + 3, start + 4])
    assert_array_equal(lines[:-3], np.arange(2, start))
    rejected = [(r.line, r.reason) for c in parts
                for r in validate_chunk(c, FEEDS["long-csv"], CAT, today=TODAY).rejections]
    assert rejected == [(start, "unknown_region"), (start + 3, "negative_count")]


def test_decimal_comma_feed_rejects_ambiguous_values_with_reason() -> None:
    feed = parse_feeds(
        "feeds:\n  - name: c\n    source: {kind: push}\n    delimiter: ';'\n    decimal: ','\n"
        "    measures: {cases: {}, tests: {scale: 0.5}}\n", source="t.yaml")["c"]
    content = (b"region;date;measure;value\nA;2026-01-01;tests;12,0\nA;2026-01-02;tests;1.234,5\n"
               b"A;2026-01-03;cases;3,0\n")
    (chunk,) = list(read_chunks(io.BytesIO(content), feed, label="f.csv"))
    result = validate_chunk(chunk, feed, CAT, today=TODAY)
    assert result.accepted.value.tolist() == [6.0, 3.0]
    (rejection,) = result.rejections
    assert (rejection.line, rejection.reason) == (3, "ambiguous_number")
    assert "'1.234,5' has a '.'" in rejection.message and "thousands" in rejection.message
