"""Streaming reader of feed files: bytes in, chunks of coded string columns with line numbers out.

The file is read in blocks of a few megabytes, so memory stays bounded whatever its size. Text must
be UTF-8 (a byte order mark is dropped) unless the feed declares another encoding; bytes that do not
decode, or NUL bytes, reject the whole file with the byte offset. The delimiter is the feed's, or is
sniffed from the header (comma, semicolon or tab, whichever occurs most). A header that lacks a
required column rejects the whole file, naming expected and found columns.

CSV follows RFC 4180: a quoted field may hold delimiters, doubled quotes and line breaks, so one
*record* may span several physical lines. Each record keeps the physical line number where it
starts (the header is line 1) and its raw text, so a rejected row can be shown to a clerk as it was
sent. A quote still open at the end of the file, or after :data:`MAX_RECORD_BYTES`, makes the line
where it opened a ``malformed_row``, and reading resumes on the next line.

Blocks are cut at record boundaries (a newline after an even number of quotes) and handed whole to
the C parser of pandas; a block it cannot read consistently is read record by record with
:mod:`csv` instead. Columns come out *coded* (:class:`Coded`: distinct values and one code per
row; :mod:`server.feeds.chunks`), so validation looks up each distinct region code, date and
value once. Decoding is :mod:`server.feeds.decoding`; JSON feeds are read by
:mod:`server.feeds.json_records` (:func:`read_chunks` picks the reader by the feed's format).
"""

from __future__ import annotations

import csv
import io
import warnings
from collections.abc import Iterator
from dataclasses import dataclass
from typing import BinaryIO

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from server.feeds.chunks import NEWLINE, QUOTE, Coded, RawChunk, record_ends
from server.feeds.decoding import BLOCK_BYTES, MAX_RECORD_BYTES, Decoder
from server.feeds.definition import FeedDefinition
from server.feeds.errors import EmptyFileError, FeedFileError, HeaderError
from server.feeds.json_records import read_json_records


def sniff_delimiter(header: str) -> str:
    """The most frequent of comma, semicolon and tab in the header line (comma on a tie)."""
    counts = {d: header.count(d) for d in (",", ";", "\t")}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] > 0 else ","


@dataclass(frozen=True, kw_only=True)
class _Block:
    """Complete records (each ended by a newline) and the physical line each starts on.

    ``malformed`` marks the one-line block of a quote that never closed.
    """

    text: bytes
    lines: NDArray[np.int64]
    malformed: bool = False

    def chunk(self, columns: dict[str, Coded], malformed: NDArray[np.bool_]) -> RawChunk:
        if self.malformed:
            return RawChunk(columns=columns, lines=self.lines, malformed=malformed,
                            text=self.text, starts=np.zeros(1, dtype=np.int64),
                            ends=np.array([len(self.text)], dtype=np.int64))
        return RawChunk(columns=columns, lines=self.lines, malformed=malformed, text=self.text)


def _split(text: bytes, line: int) -> tuple[_Block | None, bytes, int]:
    """The complete records at the front of ``text``, the rest, and the rest's first line."""
    if b'"' not in text:
        cut = text.rfind(b"\n") + 1
        n = text.count(b"\n", 0, cut)
        block = _Block(text=text[:cut], lines=np.arange(line, line + n, dtype=np.int64))
        return (block if n else None), text[cut:], line + n
    data = np.frombuffer(text, dtype=np.uint8)
    newlines = np.flatnonzero(data == NEWLINE)
    quotes = np.flatnonzero(data == QUOTE)
    ends = newlines[(np.searchsorted(quotes, newlines) & 1) == 0]
    if ends.size == 0:
        return None, text, line
    cut = int(ends[-1]) + 1
    starts = np.r_[0, ends[:-1] + 1]
    lines = line + np.searchsorted(newlines, starts).astype(np.int64)
    n = int(np.searchsorted(newlines, cut))
    return _Block(text=text[:cut], lines=lines), text[cut:], line + n


def _blocks(
    stream: BinaryIO, decoder: Decoder, block_bytes: int, max_record: int
) -> Iterator[_Block]:
    """Blocks of complete records across ``\\r\\n``, ``\\r`` and ``\\n`` endings."""
    carry = b""
    line = 1
    while True:
        raw = stream.read(block_bytes)
        final = not raw
        text = carry + decoder.decode(raw, final=final)
        hold = b""
        if not final and text.endswith(b"\r"):
            text, hold = text[:-1], b"\r"
        if b"\r" in text:
            text = text.replace(b"\r\n", b"\n").replace(b"\r", b"\n")
        if final and text and not text.endswith(b"\n"):
            text += b"\n"
        while True:
            block, text, line = _split(text, line)
            if block is not None:
                yield block
            cut = text.find(b"\n")
            if cut >= 0 and (final or len(text) > max_record) and text.count(b'"') % 2:
                # A quote that never closes: the line it opened on is one malformed record.
                yield _Block(text=text[:cut + 1], lines=np.array([line], dtype=np.int64),
                             malformed=True)
                text, line = text[cut + 1:], line + 1
                continue
            break
        if final:
            return
        carry = text + hold


def _fast_parse(text: bytes, names: list[str], delimiter: str, n: int) -> pd.DataFrame | None:
    """``text`` through the C parser; None when it does not give exactly ``n`` clean rows."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", pd.errors.ParserWarning)
            frame = pd.read_csv(
                io.BytesIO(text), header=None, names=names, dtype=str, na_filter=False,
                skip_blank_lines=False, sep=delimiter, engine="c", index_col=False,
                encoding="utf-8", quotechar='"', doublequote=True,
            )
    except (pd.errors.ParserError, pd.errors.ParserWarning, ValueError, csv.Error):
        return None
    return frame if len(frame) == n else None


def _stray_quotes(text: bytes, delimiter: str) -> bool:
    """Whether a quote stands inside a field (next to neither a delimiter, newline nor quote).

    The C parser takes such a quote literally while the record split counts it; such blocks are
    read record by record.
    """
    if b'"' not in text:
        return False
    data = np.frombuffer(text, dtype=np.uint8)
    quotes = np.flatnonzero(data == QUOTE)
    allowed = np.zeros(256, dtype=bool)
    allowed[[NEWLINE, QUOTE, ord(delimiter)]] = True
    padded = np.r_[np.uint8(NEWLINE), data, np.uint8(NEWLINE)]
    return bool((~allowed[padded[quotes]] & ~allowed[padded[quotes + 2]]).any())


def _too_wide(text: bytes, delimiter: str, fields: int) -> bool:
    """Whether a line holds far more delimiters than the header has fields.

    The C parser makes one column per field of the widest record, which takes about a minute
    for a line of a million fields; such blocks are read record by record (the record is then
    ``malformed_row``). A quoted field may hold delimiters, hence the margin.
    """
    data = np.frombuffer(text, dtype=np.uint8)
    delimiters = np.flatnonzero(data == ord(delimiter))
    limit = max(64, 4 * fields)
    if delimiters.size <= limit:
        return False
    newlines = np.flatnonzero(data == NEWLINE)
    per_line = np.diff(np.searchsorted(delimiters, np.r_[-1, newlines]))
    return bool(per_line.size and per_line.max() > limit)


def _parse_block(
    block: _Block, names: list[str], wanted: list[str], delimiter: str
) -> RawChunk:
    """Columns of ``wanted`` for the records of ``block``; record-by-record fallback on odd ones."""
    n = int(block.lines.size)
    if block.malformed:
        empty = Coded(codes=np.zeros(n, dtype=np.intp), uniques=np.array([""], dtype=object))
        return block.chunk(dict.fromkeys(wanted, empty), np.ones(n, dtype=bool))
    frame = None
    if not _stray_quotes(block.text, delimiter) and not _too_wide(block.text, delimiter,
                                                                  len(names)):
        frame = _fast_parse(block.text, names, delimiter, n)
    if frame is not None:
        return block.chunk(
            {c: Coded.of(frame[c].to_numpy(dtype=object)) for c in wanted},
            np.zeros(n, dtype=bool),
        )
    records = block.chunk({}, np.zeros(n, dtype=bool)).raw_at(np.arange(n))
    index = [names.index(c) for c in wanted]
    columns = {c: np.full(n, "", dtype=object) for c in wanted}
    malformed = np.zeros(n, dtype=bool)
    for i, record in enumerate(records):
        try:
            rows = list(csv.reader(io.StringIO(record), delimiter=delimiter))
        except csv.Error:
            rows = [[], []]
        fields = rows[0] if rows else []
        if len(rows) > 1 or len(fields) > len(names):
            malformed[i] = True
            continue
        for c, k in zip(wanted, index, strict=True):
            columns[c][i] = fields[k] if k < len(fields) else ""
    return block.chunk({c: Coded.of(v) for c, v in columns.items()}, malformed)


def _header(
    blocks: Iterator[_Block], feed: FeedDefinition, label: str
) -> tuple[list[str], str, _Block | None]:
    """Column names and delimiter from the first record; the rest of its block."""
    for block in blocks:
        end = len(block.text) if block.malformed else int(record_ends(block.text)[0]) + 1
        header = block.text[:end].decode("utf-8").removesuffix("\n")
        rest = None
        if end < len(block.text):
            rest = _Block(text=block.text[end:], lines=block.lines[1:])
        delimiter = feed.delimiter or sniff_delimiter(header.split("\n", 1)[0])
        try:
            rows = list(csv.reader(io.StringIO(header), delimiter=delimiter))
        except csv.Error:
            rows = [[header]]
        names = [f.strip() for f in (rows[0] if rows else [])]
        wanted = feed.required_columns
        if not any(names):
            raise FeedFileError(label, "line 1", "the header line is empty")
        if any(c not in names for c in wanted):
            raise HeaderError(label, wanted, names, delimiter)
        if len(set(names)) != len(names):
            dup = sorted({n for n in names if names.count(n) > 1})
            raise FeedFileError(label, "line 1", f"header repeats column(s) {dup}")
        return names, delimiter, rest
    raise EmptyFileError(label, "", "the file is empty")


def read_csv_chunks(
    stream: BinaryIO, feed: FeedDefinition, *, label: str, block_bytes: int = BLOCK_BYTES,
    max_record: int = MAX_RECORD_BYTES,
) -> Iterator[RawChunk]:
    """Stream ``stream`` as CSV per ``feed``; yields one :class:`RawChunk` per block."""
    blocks = _blocks(stream, Decoder(feed.encoding, label), block_bytes, max_record)
    names, delimiter, first = _header(blocks, feed, label)
    wanted = feed.required_columns
    if first is not None:
        yield _parse_block(first, names, wanted, delimiter)
    for block in blocks:
        yield _parse_block(block, names, wanted, delimiter)


def read_raw_records(
    stream: BinaryIO, feed: FeedDefinition, *, label: str, lines: NDArray[np.int64],
    block_bytes: int = BLOCK_BYTES, max_record: int = MAX_RECORD_BYTES,
) -> dict[int, str]:
    """Raw text of the records starting on ``lines``: a second pass that splits, never parses."""
    wanted = np.unique(np.asarray(lines, dtype=np.int64))
    found: dict[int, str] = {}
    if feed.format == "json":
        for chunk in read_json_records(stream, feed, label=label):
            hit = np.flatnonzero(np.isin(chunk.lines, wanted))
            found.update(zip(chunk.lines[hit].tolist(), chunk.raw_at(hit), strict=True))
        return found
    for block in _blocks(stream, Decoder(feed.encoding, label), block_bytes, max_record):
        hit = np.flatnonzero(np.isin(block.lines, wanted))
        if hit.size:
            chunk = block.chunk({}, np.zeros(block.lines.size, dtype=bool))
            found.update(zip(block.lines[hit].tolist(), chunk.raw_at(hit), strict=True))
    return found


def read_chunks(
    stream: BinaryIO, feed: FeedDefinition, *, label: str, block_bytes: int = BLOCK_BYTES,
    max_record: int = MAX_RECORD_BYTES,
) -> Iterator[RawChunk]:
    """Chunks of ``stream`` in the feed's format (both streamed in blocks)."""
    if feed.format == "json":
        return read_json_records(stream, feed, label=label, block_bytes=block_bytes)
    return read_csv_chunks(stream, feed, label=label, block_bytes=block_bytes,
                           max_record=max_record)
