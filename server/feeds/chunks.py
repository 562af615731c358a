"""What a feed reader yields: coded string columns (:class:`Coded`) and chunks of records
(:class:`RawChunk`) with their line numbers, malformed flags and raw text."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import pandas as pd
from numpy.typing import NDArray

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
            ends = record_ends(self.text) + 1
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


def record_ends(text: bytes) -> NDArray[np.int64]:
    """Offsets of the newlines that end a record: those after an even number of quotes."""
    data = np.frombuffer(text, dtype=np.uint8)
    newlines = np.flatnonzero(data == NEWLINE)
    if b'"' not in text:
        return newlines.astype(np.int64)
    quotes = np.flatnonzero(data == QUOTE)
    return newlines[(np.searchsorted(quotes, newlines) & 1) == 0]
