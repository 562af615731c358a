"""JSON feeds, streamed: one array of objects (or an object with a ``records`` list), read in
blocks and decoded one record at a time; a record's "line" is its position, starting at 1."""

from __future__ import annotations

import codecs
import io
import itertools
import json
from collections.abc import Iterator
from typing import BinaryIO

import numpy as np

from server.feeds.chunks import Coded, RawChunk
from server.feeds.decoding import BLOCK_BYTES, MAX_RECORD_BYTES, Decoder
from server.feeds.definition import FeedDefinition
from server.feeds.errors import EmptyFileError, FeedFileError, HeaderError


class _JsonStream:
    """Text of a JSON payload read in blocks, with the line and column of any position."""

    def __init__(self, stream: BinaryIO, decoder: Decoder, block_bytes: int) -> None:
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
    text = _JsonStream(source, Decoder(feed.encoding, label), block_bytes)
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
