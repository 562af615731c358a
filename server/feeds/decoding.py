"""Bytes of a feed file to UTF-8, checked block by block, with the byte offset and line of the
first byte that does not decode (or of a NUL byte)."""

from __future__ import annotations

import codecs

from server.feeds.errors import EncodingError

BLOCK_BYTES = 8 << 20
MAX_RECORD_BYTES = 1 << 20
BOM = codecs.BOM_UTF8


class Decoder:
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
