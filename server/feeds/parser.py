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
row), so validation looks up each distinct region code, date and value once. JSON feeds are one
array of objects (or an object with a ``records`` list); their "line" is the record's position,
starting at 1. They are streamed as well: read in blocks and decoded one record at a time.
"""

from __future__ import annotations

import codecs
import csv
import io
import itertools
import json
import warnings
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from functools import cached_property
from typing import BinaryIO

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from server.feeds.definition import FeedDefinition
from server.feeds.errors import EmptyFileError, EncodingError, FeedFileError, HeaderError

BLOCK_BYTES = 8 << 20
MAX_RECORD_BYTES = 1 << 20
BOM = codecs.BOM_UTF8
NEWLINE = 0x0A
QUOTE = 0x22


@dataclass(frozen=True)
class Coded:
    """A column of strings as distinct values (``uniques``) and one code per row (``codes``)."""

    codes: NDArray[np.intp]
    uniques: NDArray[np.object_]

    @classmethod
    def of(cls, values: NDArray[np.object_] | list[str], *, strip: bool = True) -> Coded:
        """Code ``values`` (a missing value becomes ``""``); ``strip`` strips every value."""
        codes, uniques = pd.factorize(np.asarray(values, dtype=object))
        uniques = np.asarray(uniques, dtype=object)
        if (codes < 0).any():
            uniques = np.append(uniques, "")
            codes = np.where(codes < 0, uniques.size - 1, codes)
        if strip and uniques.size:
            uniques = np.asarray([str(u).strip() for u in uniques], dtype=object)
        return cls(codes=codes.astype(np.intp, copy=False), uniques=uniques)

    def __len__(self) -> int:
        return int(self.codes.size)

    @property
    def values(self) -> NDArray[np.object_]:
        """One string per row."""
        return self.uniques[self.codes] if self.uniques.size else np.zeros(0, dtype=object)

    def take(self, index: NDArray[np.intp] | NDArray[np.bool_]) -> Coded:
        return Coded(codes=self.codes[index], uniques=self.uniques)

    def map(self, func: Callable[[NDArray[np.object_]], NDArray]) -> NDArray:  # type: ignore[type-arg]
        """``func`` applied to the distinct values, spread back to one result per row."""
        mapped = np.asarray(func(self.uniques))
        return mapped[self.codes] if self.uniques.size else mapped[:0]

    def equals(self, text: str) -> NDArray[np.bool_]:
        return self.map(lambda u: u == text).astype(bool)

    @staticmethod
    def concat(parts: list[Coded]) -> Coded:
        """Rows of ``parts`` one after the other (their distinct values are not merged)."""
        offsets = np.cumsum([0] + [p.uniques.size for p in parts[:-1]])
        return Coded(
            codes=np.concatenate([p.codes + o for p, o in zip(parts, offsets, strict=True)])
            if parts else np.zeros(0, dtype=np.intp),
            uniques=np.concatenate([p.uniques for p in parts]) if parts
            else np.zeros(0, dtype=object),
        )


@dataclass(frozen=True, kw_only=True)
class RawChunk:
    """Records of one block: coded columns, start line numbers, malformed flags, raw text.

    ``text`` holds the records as UTF-8 bytes, each ended by a newline; ``starts`` and ``ends``
    give each record's span in it (found on first use when not given). JSON chunks give
    ``records`` instead: one raw text per record.
    """

    columns: dict[str, Coded]
    lines: NDArray[np.int64]
    malformed: NDArray[np.bool_]
    text: bytes = b""
    starts: NDArray[np.int64] | None = None
    ends: NDArray[np.int64] | None = None
    records: NDArray[np.object_] | None = None
    _spans: list[NDArray[np.int64]] = field(default_factory=list, repr=False, compare=False)

    def __len__(self) -> int:
        return int(self.lines.size)

    def spans(self) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        """Start and end (after the newline) of every record in ``text``."""
        if self.starts is not None and self.ends is not None:
            return self.starts, self.ends
        if not self._spans:
            ends = _record_ends(self.text) + 1
            starts = np.r_[0, ends[:-1]] if ends.size else ends
            self._spans.extend([starts.astype(np.int64), ends])
        return self._spans[0], self._spans[1]

    def raw_at(self, index: NDArray[np.intp] | list[int]) -> list[str]:
        """Raw text of the records at ``index`` (line breaks inside a record kept as ``\\n``)."""
        rows = np.asarray(index, dtype=np.intp)
        if self.records is not None:
            return [str(r) for r in self.records[rows]]
        starts, ends = self.spans()
        text = self.text
        return [
            text[a:b].decode("utf-8").removesuffix("\n")
            for a, b in zip(starts[rows].tolist(), ends[rows].tolist(), strict=True)
        ]

    @cached_property
    def raw(self) -> NDArray[np.object_]:
        """Raw text of every record (built on demand; validation reads only rejected rows)."""
        return np.asarray(self.raw_at(np.arange(len(self))), dtype=object)

    def take(self, index: NDArray[np.intp]) -> RawChunk:
        """The records at ``index``, sharing this chunk's text."""
        if self.records is not None:
            return RawChunk(
                columns={k: v.take(index) for k, v in self.columns.items()},
                lines=self.lines[index], malformed=self.malformed[index],
                records=self.records[index],
            )
        starts, ends = self.spans()
        return RawChunk(
            columns={k: v.take(index) for k, v in self.columns.items()},
            lines=self.lines[index], malformed=self.malformed[index], text=self.text,
            starts=starts[index], ends=ends[index],
        )


def sniff_delimiter(header: str) -> str:
    """The most frequent of comma, semicolon and tab in the header line (comma on a tie)."""
    counts = {d: header.count(d) for d in (",", ";", "\t")}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] > 0 else ","


class _Decoder:
    """Incremental decoder to UTF-8 bytes that reports the byte offset of the first bad byte."""

    def __init__(self, encoding: str, label: str) -> None:
        self.encoding = encoding
        self.label = label
        self.offset = 0
        self.newlines = 0  # line breaks in the bytes decoded so far
        self.first = True
        self.utf8 = codecs.lookup(encoding).name == "utf-8"
        self.decoder = codecs.getincrementaldecoder(encoding)(errors="strict")

    def decode(self, block: bytes, *, final: bool) -> bytes:
        """``block`` checked (UTF-8) or decoded and re-encoded as UTF-8 (any other encoding)."""
        start = self.offset
        if self.first and self.utf8 and block.startswith(BOM):
            block = block[len(BOM):]
            start += len(BOM)
            self.offset += len(BOM)
        self.first = False
        pending = len(self.decoder.getstate()[0])
        nul = block.find(b"\x00")
        if nul >= 0:
            raise EncodingError(self.label, start + nul, self.encoding, self._line(block, nul))
        try:
            text = self.decoder.decode(block, final)
        except UnicodeDecodeError as exc:
            at = max(exc.start - pending, 0)
            raise EncodingError(self.label, start - pending + exc.start, self.encoding,
                                self._line(block, at)) from None
        self.offset += len(block)
        self.newlines += block.count(b"\n")
        return block if self.utf8 else text.encode("utf-8")

    def _line(self, block: bytes, at: int) -> int:
        """Physical line (1-based) of byte ``at`` of ``block`` (line breaks as ``\\n``)."""
        return self.newlines + block.count(b"\n", 0, at) + 1


def _record_ends(text: bytes) -> NDArray[np.int64]:
    """Offsets of the newlines that end a record: those after an even number of quotes."""
    data = np.frombuffer(text, dtype=np.uint8)
    newlines = np.flatnonzero(data == NEWLINE)
    if b'"' not in text:
        return newlines.astype(np.int64)
    quotes = np.flatnonzero(data == QUOTE)
    return newlines[(np.searchsorted(quotes, newlines) & 1) == 0]


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
    stream: BinaryIO, decoder: _Decoder, block_bytes: int, max_record: int
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
        end = len(block.text) if block.malformed else int(_record_ends(block.text)[0]) + 1
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
    blocks = _blocks(stream, _Decoder(feed.encoding, label), block_bytes, max_record)
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
    for block in _blocks(stream, _Decoder(feed.encoding, label), block_bytes, max_record):
        hit = np.flatnonzero(np.isin(block.lines, wanted))
        if hit.size:
            chunk = block.chunk({}, np.zeros(block.lines.size, dtype=bool))
            found.update(zip(block.lines[hit].tolist(), chunk.raw_at(hit), strict=True))
    return found


class _JsonStream:
    """Text of a JSON payload read in blocks, with the line and column of any position."""

    def __init__(self, stream: BinaryIO, decoder: _Decoder, block_bytes: int) -> None:
        self.stream = stream
        self.decoder = codecs.getincrementaldecoder("utf-8")()
        self.bytes = decoder
        self.block_bytes = block_bytes
        self.text = ""
        self.pos = 0
        self.line = 1  # line of text[0]
        self.column = 1
        self.done = False
        self.last = ""

    def more(self) -> bool:
        """Read the next block; False at the end of the payload."""
        if self.done:
            return False
        raw = self.stream.read(self.block_bytes)
        final = not raw
        chunk = self.decoder.decode(self.bytes.decode(raw, final=final), final)
        if self.pos > (1 << 20):  # drop what is consumed, keeping line numbers right
            dropped = self.text[:self.pos]
            newlines = dropped.count("\n")
            self.line += newlines
            self.column = (len(dropped) - dropped.rfind("\n")) if newlines else (
                self.column + len(dropped))
            self.text, self.pos = self.text[self.pos:], 0
        self.text += chunk
        self.done = final
        return True

    def where(self, pos: int) -> str:
        head = self.text[:pos]
        newlines = head.count("\n")
        column = (pos - head.rfind("\n")) if newlines else self.column + pos
        return f"line {self.line + newlines} column {column}"

    def peek(self) -> str:
        """The next character that is not white space ("" at the end)."""
        while True:
            while self.pos < len(self.text) and self.text[self.pos] in " \t\r\n":
                self.pos += 1
            if self.pos < len(self.text):
                return self.text[self.pos]
            if not self.more():
                return ""

    def value(self, decoder: json.JSONDecoder, label: str, record: int | None = None) -> object:
        """The next JSON value, reading more text until it is complete (its text: ``last``).

        ``record`` (1-based position in the list of records) is named in errors. A value nested
        more deeply than Python's recursion limit allows (about 1 000 levels) rejects the file
        with that record's place, as any other invalid JSON does.
        """
        self.peek()
        while True:
            try:
                value, end = decoder.raw_decode(self.text, self.pos)
            except json.JSONDecodeError as exc:
                # Near the end of the text the value may just be cut by the block: read on.
                # Further back it is invalid (and a record longer than MAX_RECORD_BYTES is, too).
                if len(self.text) - exc.pos <= MAX_RECORD_BYTES and self.more():
                    continue
                raise FeedFileError(label, self._place(exc.pos, record),
                                    f"not valid JSON ({exc.msg})") from None
            except RecursionError:
                raise FeedFileError(
                    label, self._place(self.pos, record),
                    "the JSON is nested too deeply (a record is an object of plain values)",
                ) from None
            if end == len(self.text) and not self.done and isinstance(value, int | float):
                self.more()  # a number may go on in the next block
                continue
            self.last = self.text[self.pos:end]
            self.pos = end
            return value

    def _place(self, pos: int, record: int | None) -> str:
        return self.where(pos) if record is None else f"record {record}, {self.where(pos)}"

    def expect(self, allowed: str, label: str) -> str:
        char = self.peek()
        if not char or char not in allowed:
            found = repr(char) if char else "the end"
            raise FeedFileError(label, self.where(self.pos),
                                f"not valid JSON (expected {' or '.join(allowed)}, found {found})")
        self.pos += 1
        return char


def _json_records(text: _JsonStream, label: str) -> Iterator[tuple[object, str]]:
    """Records of ``[...]`` or of the ``records`` list of ``{...}``, each with its text."""
    decoder = _decoder()
    shape = "expected a JSON array of records or {\"records\": [...]}"
    start = text.peek()
    if start == "{":
        text.pos += 1
        seen = False
        if text.peek() == "}":
            text.pos += 1
        else:
            while True:
                key = text.value(decoder, label)
                text.expect(":", label)
                if key == "records" and text.peek() == "[" and not seen:
                    seen = True
                    text.pos += 1
                    yield from _json_array(text, decoder, label)
                else:
                    text.value(decoder, label)
                if text.expect(",}", label) == "}":
                    break
        if not seen:
            raise FeedFileError(label, "", shape)
    elif start == "[":
        text.pos += 1
        yield from _json_array(text, decoder, label)
    else:
        if start:
            text.value(decoder, label)  # a valid JSON value of the wrong shape, or an error
        raise FeedFileError(label, "", shape) if start else EmptyFileError(
            label, "", "the file is empty")
    if text.peek():
        raise FeedFileError(label, text.where(text.pos), "not valid JSON (Extra data)")


def _keep_digits(digits: str) -> str:
    """JSON integers are kept as their digits: a value is read from its text anyway, and
    ``int()`` refuses more than 4 300 digits (a ``ValueError`` outside ``JSONDecodeError``)."""
    return digits


def _decoder() -> json.JSONDecoder:
    return json.JSONDecoder(parse_int=_keep_digits)


def _json_array(
    text: _JsonStream, decoder: json.JSONDecoder, label: str
) -> Iterator[tuple[object, str]]:
    if text.peek() == "]":
        text.pos += 1
        return
    for number in itertools.count(1):
        record = text.value(decoder, label, number)
        yield record, text.last
        if text.expect(",]", label) == "]":
            return


def read_json_records(
    stream: BinaryIO | bytes, feed: FeedDefinition, *, label: str, chunk_rows: int = 50_000,
    block_bytes: int = BLOCK_BYTES,
) -> Iterator[RawChunk]:
    """Stream JSON records (a list of objects, or ``{"records": [...]}``) in chunks.

    The document is read in blocks and decoded one record at a time, so memory stays bounded by
    one chunk of records. A column the feed requires that no record has rejects the whole file
    (:class:`~server.feeds.errors.HeaderError`), raised after the last chunk: the caller's
    transaction is rolled back then, as for any whole-file rejection.
    """
    source = io.BytesIO(stream) if isinstance(stream, bytes) else stream
    text = _JsonStream(source, _Decoder(feed.encoding, label), block_bytes)
    wanted = feed.required_columns
    found: set[str] = set()
    records = _json_records(text, label)
    start = 0
    total = 0
    while True:
        part = list(itertools.islice(records, chunk_rows))
        if not part:
            break
        n = len(part)
        columns = {c: np.full(n, "", dtype=object) for c in wanted}
        malformed = np.zeros(n, dtype=bool)
        raw = np.empty(n, dtype=object)
        for i, (record, source) in enumerate(part):
            raw[i] = source[:2000]
            if not isinstance(record, dict):
                malformed[i] = True
                continue
            found.update(record)
            for c in wanted:
                v = record.get(c)
                columns[c][i] = "" if v is None else (str(v).lower() if isinstance(v, bool)
                                                      else str(v))
        del part
        yield RawChunk(
            columns={c: Coded.of(v) for c, v in columns.items()},
            lines=np.arange(start + 1, start + n + 1, dtype=np.int64),
            malformed=malformed, records=raw,
        )
        start += n
        total += n
    if total and any(c not in found for c in wanted):
        raise HeaderError(label, wanted, sorted(found))


def read_chunks(
    stream: BinaryIO, feed: FeedDefinition, *, label: str, block_bytes: int = BLOCK_BYTES,
    max_record: int = MAX_RECORD_BYTES,
) -> Iterator[RawChunk]:
    """Chunks of ``stream`` in the feed's format (both streamed in blocks)."""
    if feed.format == "json":
        return read_json_records(stream, feed, label=label, block_bytes=block_bytes)
    return read_csv_chunks(stream, feed, label=label, block_bytes=block_bytes,
                           max_record=max_record)
