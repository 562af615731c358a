"""Row validation of feed chunks: each bad row gets a reason code and a message a clerk can act on.

Row checks (vectorised over a chunk, the first failing check names the reason):

=====================  ==============================================================
reason                 meaning
=====================  ==============================================================
malformed_row          more fields than the header, or an unclosed quote
unknown_region         the region code (after the feed's mapping) is not in the catalogue
unknown_measure        the measure is not one this feed carries, or not in the catalogue
unparsable_date        not an ISO 8601 date (weekly feeds also take ISO weeks, 2026-W14)
future_date            the reference date is after today in the office's time zone
date_too_old           the reference date is before :data:`EARLIEST_DATE` (1990-01-01)
missing_value          the value is empty
ambiguous_number       a separator the feed declares neither as ``decimal`` nor ``thousands``
bad_digit_grouping     thousands separators not between groups of three digits
non_numeric_value      the value is not a finite number
negative_count         a count measure below zero
non_integer_count      a count measure with a fractional value
out_of_range           outside the plausible range set for the measure in the feed
=====================  ==============================================================

File checks (over all rows that passed) are :mod:`server.feeds.file_checks`: ``duplicate_row``,
``conflicting_duplicate``, ``positives_exceed_tests`` (within the file and against stored values);
``outranked`` marks a row that would revise a value sent by a feed of higher precedence for the
measure (``server/services/revisions.py``).

Checks run on the distinct values of each column (:class:`~server.feeds.chunks.Coded`; dates and
numbers are read by :mod:`server.feeds.values`) and are spread back to rows with numpy; messages
are built for rejected rows only.

An ISO week is stored on its Monday. Values are multiplied by the measure's ``scale`` before the
count and range checks.

A count is a whole number from 0 to :data:`MAX_COUNT`. A count within :data:`COUNT_TOLERANCE` of a
whole number (``5.0000000001``, ``4.9e-324``: floating-point residue from a sender that computes
counts as floats) is stored *as that whole number*, so what is stored is exactly what the
indicators take (``server.indicators.poisson`` refuses any fraction); a larger fraction is
``non_integer_count``. A count over :data:`MAX_COUNT`, or a value that the scale makes infinite,
is ``out_of_range``.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import date

import numpy as np
from numpy.typing import NDArray

from server.feeds.chunks import Coded, RawChunk
from server.feeds.definition import FeedDefinition
from server.feeds.values import AMBIGUOUS, BAD_GROUPING, EPOCH, days_of, parse_numbers
from server.store.vintages import Rejection

Messages = Callable[[NDArray[np.int64]], list[str]]
REASONS = (
    "malformed_row", "unknown_region", "unknown_measure", "unparsable_date", "future_date",
    "missing_value", "non_numeric_value", "negative_count", "non_integer_count", "out_of_range",
    "duplicate_row", "conflicting_duplicate", "positives_exceed_tests", "ambiguous_number",
    "bad_digit_grouping", "date_too_old", "outranked",
)
# Reference dates before this are refused: every evaluation runs from the oldest stored date, so
# one row dated 0001-01-01 would make each one span two thousand years.
EARLIEST_DATE = date(1990, 1, 1)
# A count closer than this to a whole number is that whole number (stored rounded).
COUNT_TOLERANCE = 1e-9
# The largest count stored: float64 holds every whole number up to 2**53 exactly, and a 7-day
# window of such counts still sums to a finite number.
MAX_COUNT = float(2**53)


@dataclass(frozen=True, kw_only=True)
class Catalogue:
    """What the store knows: region code -> id, measure name -> id, and which are counts."""

    regions: Mapping[str, int]
    measures: Mapping[str, int]
    counts: frozenset[str]


@dataclass(frozen=True, kw_only=True)
class Accepted:
    """Rows that passed the row checks, as compact arrays (one entry per observation)."""

    region_id: NDArray[np.int64]
    measure_id: NDArray[np.int64]
    day: NDArray[np.int64]  # days since 1970-01-01
    value: NDArray[np.float64]
    line: NDArray[np.int64]

    def __len__(self) -> int:
        return int(self.line.size)

    @classmethod
    def concat(cls, parts: list[Accepted]) -> Accepted:
        if not parts:
            e = np.zeros(0, dtype=np.int64)
            return cls(region_id=e, measure_id=e, day=e, value=np.zeros(0), line=e)
        return cls(**{
            k: np.concatenate([getattr(p, k) for p in parts])
            for k in ("region_id", "measure_id", "day", "value", "line")
        })

    def take(self, index: NDArray[np.int64] | NDArray[np.bool_]) -> Accepted:
        return Accepted(
            region_id=self.region_id[index], measure_id=self.measure_id[index],
            day=self.day[index], value=self.value[index], line=self.line[index],
        )


@dataclass(frozen=True, kw_only=True)
class ChunkResult:
    accepted: Accepted
    rejections: list[Rejection]
    skipped_blank: int


def _lookup(text: Coded, mapping: Mapping[str, int]) -> NDArray[np.float64]:
    return text.map(
        lambda u: np.asarray([mapping.get(v, np.nan) for v in u.tolist()], dtype=np.float64)
    )


def _long_form(chunk: RawChunk, feed: FeedDefinition) -> tuple[dict[str, Coded], NDArray]:
    """Columns region, date, measure (feed's measure name), value; and row -> chunk row index."""
    c = feed.columns
    cols = chunk.columns
    n = len(chunk)
    if feed.layout == "long":
        by_source = {m.source: m.measure for m in feed.measures}
        source = cols[c.measure]
        measure = Coded(codes=source.codes, uniques=np.asarray(
            [by_source.get(u, "\x00" + u) for u in source.uniques.tolist()], dtype=object))
        return (
            {"region": cols[c.region], "date": cols[c.date], "measure": measure,
             "value": cols[c.value]},
            np.arange(n),
        )
    parts_index, parts_measure, parts_value = [], [], []
    for m in feed.measures:
        values = cols[m.source]
        present = np.flatnonzero(~values.equals(""))
        parts_index.append(present)
        parts_measure.append(np.full(present.size, len(parts_measure), dtype=np.intp))
        parts_value.append(values.take(present))
    index = np.concatenate(parts_index)
    order = np.argsort(index, kind="stable")
    index = index[order]
    names = np.asarray([m.measure for m in feed.measures], dtype=object)
    return (
        {"region": cols[c.region].take(index), "date": cols[c.date].take(index),
         "measure": Coded(codes=np.concatenate(parts_measure)[order], uniques=names),
         "value": Coded.concat(parts_value).take(order)},
        index,
    )


def _blank_rows(chunk: RawChunk) -> NDArray[np.bool_]:
    """Records that are empty or only white space (every column empty is the cheap pre-test)."""
    empty = ~chunk.malformed
    for column in chunk.columns.values():
        empty &= column.equals("")
    candidates = np.flatnonzero(empty)
    if candidates.size:
        empty[candidates] = [not r.strip() for r in chunk.raw_at(candidates)]
    return empty


def validate_chunk(
    chunk: RawChunk, feed: FeedDefinition, catalogue: Catalogue, *, today: date
) -> ChunkResult:
    """Apply the row checks to ``chunk``; returns accepted arrays and rejections."""
    blank = _blank_rows(chunk)
    sub = chunk.take(np.flatnonzero(~blank)) if blank.any() else chunk
    cols, row = _long_form(sub, feed)
    n = row.size
    reason = np.zeros(n, dtype=np.int8)  # index into REASONS, plus one; 0 = accepted so far
    detail = np.full(n, "", dtype=object)

    def flag(mask: NDArray[np.bool_], code: str, text: Messages) -> None:
        new = np.flatnonzero(mask & (reason == 0))
        if new.size:
            reason[new] = REASONS.index(code) + 1
            detail[new] = text(new)

    def quoted(values: Coded) -> Messages:
        return lambda idx: [repr(str(v)[:80]) for v in values.take(idx).values]

    def fixed(message: str) -> Messages:
        return lambda idx: [message] * idx.size

    def framed(before: str, values: Coded, after: str) -> Messages:
        return lambda idx: [f"{before}{v}{after}" for v in quoted(values)(idx)]

    flag(sub.malformed[row], "malformed_row",
         fixed("more fields than the header, or an open quote"))
    region_code = cols["region"]
    if feed.regions:
        region_code = Coded(codes=region_code.codes, uniques=np.asarray(
            [feed.regions.get(u, u) for u in region_code.uniques.tolist()], dtype=object))
    region_id = _lookup(region_code, catalogue.regions)
    flag(np.isnan(region_id), "unknown_region", framed("unknown region code ", cols["region"], ""))
    measure = cols["measure"]
    measure_id = _lookup(measure, catalogue.measures)
    flag(np.isnan(measure_id), "unknown_measure", lambda idx: [
        f"measure {str(m).lstrip(chr(0))[:80]!r} is not carried by feed {feed.name!r}"
        for m in measure.take(idx).values
    ])
    weeks = feed.cadence == "weekly"
    day = cols["date"].map(lambda u: days_of(u, weeks=weeks))
    expect = "YYYY-MM-DD or YYYY-Www" if weeks else "YYYY-MM-DD"
    flag(np.isnan(day), "unparsable_date",
         framed("date ", cols["date"], f" is not a date ({expect})"))
    today_n = (today - EPOCH).days
    with np.errstate(invalid="ignore"):
        flag(day > today_n, "future_date", framed("date ", cols["date"], " is in the future"))
        flag(day < (EARLIEST_DATE - EPOCH).days, "date_too_old", framed(
            "date ", cols["date"], f" is before {EARLIEST_DATE.isoformat()}, the earliest taken"))
    raw_value = cols["value"]
    flag(raw_value.equals(""), "missing_value", fixed("the value is empty"))
    parsed, problem = parse_numbers(
        raw_value.uniques, decimal=feed.decimal, thousands=feed.thousands
    )
    value = parsed[raw_value.codes] if raw_value.uniques.size else np.zeros(0)
    problem = problem[raw_value.codes] if raw_value.uniques.size else np.zeros(0, np.int8)
    other = "," if feed.decimal == "." else "."
    flag(problem == AMBIGUOUS, "ambiguous_number", framed(
        "value ", raw_value,
        f" has a {other!r}, which this feed declares neither as its decimal mark "
        f"({feed.decimal!r}) nor as its thousands separator (set `decimal:` or `thousands:`)",
    ))
    flag(problem == BAD_GROUPING, "bad_digit_grouping", framed(
        "value ", raw_value,
        f" does not put the thousands separator {feed.thousands!r} between groups of three "
        "digits before the decimal mark",
    ))
    flag(~np.isfinite(value), "non_numeric_value", framed("value ", raw_value, " is not a number"))
    names = measure.uniques.tolist()
    spec = {m.measure: m for m in feed.measures}
    per_measure = np.asarray([
        (spec[u].scale, -np.inf if spec[u].minimum is None else spec[u].minimum,
         np.inf if spec[u].maximum is None else spec[u].maximum, u in catalogue.counts)
        if u in spec else (1.0, -np.inf, np.inf, False)
        for u in names
    ], dtype=np.float64).reshape(len(names), 4)
    scale, low, high, counts = (per_measure[measure.codes, k] if names else np.zeros(0)
                                for k in range(4))
    is_count = counts.astype(bool)
    with np.errstate(invalid="ignore", over="ignore"):
        value = value * scale
        flag(is_count & (value < 0), "negative_count",
             framed("a count cannot be negative: ", raw_value, ""))
        flag(is_count & (np.abs(value - np.rint(value)) > COUNT_TOLERANCE), "non_integer_count",
             framed("a count must be a whole number: ", raw_value, ""))
        flag(~np.isfinite(value), "out_of_range", lambda idx: [
            f"value {str(v)[:80]!r} times the scale {s:g} is too large to store"
            for v, s in zip(raw_value.take(idx).values, scale[idx], strict=True)
        ])
        flag(is_count & (value > MAX_COUNT), "out_of_range",
             framed("count ", raw_value, f" is above the largest count stored ({MAX_COUNT:.0f})"))
        flag((value < low) | (value > high), "out_of_range", lambda idx: [
            f"value {str(v)[:80]!r} is outside the plausible range [{a:g}, {b:g}]"
            for v, a, b in zip(raw_value.take(idx).values, low[idx], high[idx], strict=True)
        ])
        # Counts are stored as the whole numbers they were checked to be (-0.0 becomes 0.0).
        value = np.where(is_count, np.rint(value) + 0.0, value)
    bad = reason != 0
    good = ~bad
    accepted = Accepted(
        region_id=region_id[good].astype(np.int64), measure_id=measure_id[good].astype(np.int64),
        day=day[good].astype(np.int64), value=value[good], line=sub.lines[row[good]],
    )
    rejections = _rejections(sub, row[bad], reason[bad], detail[bad])
    return ChunkResult(accepted=accepted, rejections=rejections, skipped_blank=int(blank.sum()))


def _rejections(
    sub: RawChunk, rows: NDArray[np.int64], reasons: NDArray[np.int8],
    details: NDArray[np.object_],
) -> list[Rejection]:
    out: list[Rejection] = []
    seen: set[tuple[int, int]] = set()
    raw = sub.raw_at(rows) if rows.size else []
    for r, code, text, record in zip(rows.tolist(), reasons.tolist(), details.tolist(), raw,
                                      strict=True):
        line = int(sub.lines[r])
        if (line, code) in seen:  # wide rows: one rejection per line and reason
            continue
        seen.add((line, code))
        out.append(Rejection(line=line, raw=record[:2000], reason=REASONS[code - 1],
                             message=text))
    return out
