"""Streaming reader of feed files: bytes in, chunks of raw string columns with line numbers out.

The file is read in blocks of a few megabytes, so memory stays bounded whatever its size. Text must
be UTF-8 (a byte order mark is dropped) unless the feed declares another encoding; bytes that do not
decode, or NUL bytes, reject the whole file with the byte offset. The delimiter is the feed's, or is
sniffed from the header (comma, semicolon or tab, whichever occurs most). A header that lacks a
required column rejects the whole file, naming expected and found columns.

Each CSV row keeps its physical line number (the header is line 1) and its raw text, so a rejected
row can be shown to a clerk as it was sent. JSON feeds are one array of objects (or an object with
a ``records`` list); their "line" is the record's position, starting at 1.
"""

from __future__ import annotations

import codecs
import csv
import io
import json
from collections.abc import Iterator
from dataclasses import dataclass
from typing import BinaryIO

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from server.feeds.definition import FeedDefinition
from server.feeds.errors import EncodingError, FeedFileError, HeaderError

BLOCK_BYTES = 8 << 20
BOM = codecs.BOM_UTF8


@dataclass(frozen=True, kw_only=True)
class RawChunk:
    """Rows of one block: string columns (stripped), line numbers, raw text, malformed flags."""

    columns: dict[str, NDArray[np.object_]]
    lines: NDArray[np.int64]
    raw: NDArray[np.object_]
    malformed: NDArray[np.bool_]

    def __len__(self) -> int:
        return int(self.lines.size)


def sniff_delimiter(header: str) -> str:
    """The most frequent of comma, semicolon and tab in the header line (comma on a tie)."""
    counts = {d: header.count(d) for d in (",", ";", "\t")}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] > 0 else ","


class _Decoder:
    """Incremental decoder that reports the absolute byte offset of the first bad byte."""

    def __init__(self, encoding: str, label: str) -> None:
        self.encoding = encoding
        self.label = label
        self.offset = 0
        self.first = True
        strict_utf8 = codecs.lookup(encoding).name == "utf-8"
        self.utf8 = strict_utf8
        self.decoder = codecs.getincrementaldecoder(encoding)(errors="strict")

    def decode(self, block: bytes, *, final: bool) -> str:
        start = self.offset
        if self.first and self.utf8 and block.startswith(BOM):
            block = block[len(BOM):]
            start += len(BOM)
            self.offset += len(BOM)
        self.first = False
        pending = len(self.decoder.getstate()[0])
        nul = block.find(b"\x00")
        if nul >= 0:
            raise EncodingError(self.label, start + nul, self.encoding)
        try:
            text = self.decoder.decode(block, final)
        except UnicodeDecodeError as exc:
            raise EncodingError(self.label, start - pending + exc.start, self.encoding) from None
        self.offset += len(block)
        return text


def _lines_of(stream: BinaryIO, decoder: _Decoder, block_bytes: int) -> Iterator[list[str]]:
    """Blocks of complete lines (newline-free), across \\r\\n, \\r and \\n endings."""
    carry = ""
    while True:
        block = stream.read(block_bytes)
        final = not block
        text = carry + decoder.decode(block, final=final)
        if not final and text.endswith("\r"):
            text, carry = text[:-1], "\r"
        else:
            carry = ""
        if "\r" in text:
            text = text.replace("\r\n", "\n").replace("\r", "\n")
        if final:
            if text:
                yield text.split("\n") if not text.endswith("\n") else text[:-1].split("\n")
            return
        cut = text.rfind("\n")
        if cut < 0:
            carry = text + carry
            continue
        carry = text[cut + 1:] + carry
        yield text[:cut].split("\n")


def _split_fields(line: str, delimiter: str) -> list[str]:
    try:
        return next(csv.reader([line], delimiter=delimiter), [])
    except csv.Error:
        return [line]


def _parse_block(
    lines: list[str], names: list[str], wanted: list[str], delimiter: str
) -> tuple[dict[str, NDArray[np.object_]], NDArray[np.bool_]]:
    """Columns of ``wanted`` for ``lines``; fast C parser, line-by-line fallback on odd rows."""
    n = len(lines)
    try:
        frame = pd.read_csv(
            io.StringIO("\n".join(lines) + "\n"), header=None, names=names,
            dtype=str, na_filter=False, skip_blank_lines=False, sep=delimiter, engine="c",
            index_col=False,
        )
        if len(frame) == n:
            return (
                {c: frame[c].to_numpy(dtype=object) for c in wanted},
                np.zeros(n, dtype=bool),
            )
    except (pd.errors.ParserError, ValueError, csv.Error):
        pass
    index = [names.index(c) for c in wanted]
    columns = {c: np.full(n, "", dtype=object) for c in wanted}
    malformed = np.zeros(n, dtype=bool)
    for i, line in enumerate(lines):
        fields = _split_fields(line, delimiter)
        if len(fields) > len(names) or ('"' in line and line.count('"') % 2):
            malformed[i] = True
            continue
        for c, k in zip(wanted, index, strict=True):
            columns[c][i] = fields[k] if k < len(fields) else ""
    return columns, malformed


def _stripped(columns: dict[str, NDArray[np.object_]]) -> dict[str, NDArray[np.object_]]:
    out = {}
    for c, values in columns.items():
        codes, uniques = pd.factorize(values)
        out[c] = np.asarray([str(u).strip() for u in uniques], dtype=object)[codes] if len(
            uniques
        ) else values
    return out


def read_csv_chunks(
    stream: BinaryIO, feed: FeedDefinition, *, label: str, block_bytes: int = BLOCK_BYTES
) -> Iterator[RawChunk]:
    """Stream ``stream`` as CSV per ``feed``; yields one :class:`RawChunk` per block."""
    decoder = _Decoder(feed.encoding, label)
    blocks = _lines_of(stream, decoder, block_bytes)
    header_line: str | None = None
    pending: list[str] = []
    for lines in blocks:
        if header_line is None:
            if not lines:
                continue
            header_line, pending = lines[0], lines[1:]
            break
    if header_line is None:
        raise HeaderError(label, feed.required_columns, [])
    delimiter = feed.delimiter or sniff_delimiter(header_line)
    names = [f.strip() for f in _split_fields(header_line, delimiter)]
    wanted = feed.required_columns
    if any(c not in names for c in wanted):
        raise HeaderError(label, wanted, names)
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise FeedFileError(label, "line 1", f"header repeats column(s) {dup}")
    next_line = 2
    block = pending
    while True:
        if block:
            columns, malformed = _parse_block(block, names, wanted, delimiter)
            yield RawChunk(
                columns=_stripped(columns),
                lines=np.arange(next_line, next_line + len(block), dtype=np.int64),
                raw=np.asarray(block, dtype=object),
                malformed=malformed,
            )
            next_line += len(block)
        try:
            block = next(blocks)
        except StopIteration:
            return


def read_json_records(
    content: bytes, feed: FeedDefinition, *, label: str, chunk_rows: int = 200_000
) -> Iterator[RawChunk]:
    """Parse ``content`` as JSON records (a list of objects, or ``{"records": [...]}``)."""
    text = _Decoder(feed.encoding, label).decode(content, final=True)
    try:
        document = json.loads(text)
    except json.JSONDecodeError as exc:
        raise FeedFileError(
            label, f"line {exc.lineno} column {exc.colno}", f"not valid JSON ({exc.msg})"
        ) from None
    if isinstance(document, dict) and isinstance(document.get("records"), list):
        document = document["records"]
    if not isinstance(document, list):
        raise FeedFileError(label, "", "expected a JSON array of records or {\"records\": [...]}")
    wanted = feed.required_columns
    found: set[str] = set()
    for record in document:
        if isinstance(record, dict):
            found.update(str(k) for k in record)
    if document and any(c not in found for c in wanted):
        raise HeaderError(label, wanted, sorted(found))
    for start in range(0, len(document), chunk_rows):
        part = document[start:start + chunk_rows]
        n = len(part)
        columns = {c: np.full(n, "", dtype=object) for c in wanted}
        malformed = np.zeros(n, dtype=bool)
        raw = np.empty(n, dtype=object)
        for i, record in enumerate(part):
            raw[i] = json.dumps(record, ensure_ascii=False)[:2000]
            if not isinstance(record, dict):
                malformed[i] = True
                continue
            for c in wanted:
                v = record.get(c)
                columns[c][i] = "" if v is None else (str(v).lower() if isinstance(v, bool)
                                                      else str(v))
        yield RawChunk(
            columns=_stripped(columns),
            lines=np.arange(start + 1, start + n + 1, dtype=np.int64),
            raw=raw, malformed=malformed,
        )


def read_chunks(
    stream: BinaryIO, feed: FeedDefinition, *, label: str, block_bytes: int = BLOCK_BYTES
) -> Iterator[RawChunk]:
    """Chunks of ``stream`` in the feed's format (CSV streamed; JSON read whole)."""
    if feed.format == "json":
        return read_json_records(stream.read(), feed, label=label)
    return read_csv_chunks(stream, feed, label=label, block_bytes=block_bytes)
