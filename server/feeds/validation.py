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

File checks (over all rows that passed, see :func:`check_file`): ``duplicate_row`` (same key and
value as an earlier line, which is kept), ``conflicting_duplicate`` (same key, different values:
every such line is rejected), ``positives_exceed_tests`` (both lines rejected); and, with values
read from the store, ``positives_exceed_tests`` for a file's positives (tests) whose tests
(positives) for that region and date are only stored (:func:`check_stored_pairs`), and
``outranked`` for a row that would revise a value sent by a feed of higher precedence for the
measure (``server/services/revisions.py``).

Checks run on the distinct values of each column (:class:`~server.feeds.parser.Coded`) and are
spread back to rows with numpy; messages are built for rejected rows only.

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

import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import date

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from server.feeds.definition import FeedDefinition
from server.feeds.parser import Coded, RawChunk
from server.store.reads import StoredValues
from server.store.vintages import Rejection

EPOCH = date(1970, 1, 1)
Messages = Callable[[NDArray[np.int64]], list[str]]
ISO_DATE = re.compile(r"^([0-9]{4})-([0-9]{2})-([0-9]{2})$")  # ASCII digits only
ISO_WEEK = re.compile(r"^([0-9]{4})-?W([0-9]{2})$")
REASONS = (
    "malformed_row", "unknown_region", "unknown_measure", "unparsable_date", "future_date",
    "missing_value", "non_numeric_value", "negative_count", "non_integer_count", "out_of_range",
    "duplicate_row", "conflicting_duplicate", "positives_exceed_tests", "ambiguous_number",
    "bad_digit_grouping", "date_too_old", "outranked",
)
AMBIGUOUS, BAD_GROUPING = 1, 2
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


@dataclass(frozen=True, kw_only=True)
class FileCheck:
    """Outcome of the whole-file checks: which accepted rows to keep, and why others went."""

    keep: NDArray[np.bool_]
    lines: NDArray[np.int64]
    reasons: tuple[str, ...]
    messages: tuple[str, ...]


def day_numbers(text: NDArray[np.object_], *, weeks: bool) -> NDArray[np.float64]:
    """Days since 1970-01-01 of ISO dates (and ISO weeks when ``weeks``); NaN when unparsable."""
    coded = Coded.of(text, strip=False)
    return coded.map(lambda u: _days_of(u, weeks=weeks)).astype(np.float64)


def _days_of(uniques: NDArray[np.object_], *, weeks: bool) -> NDArray[np.float64]:
    parsed = np.full(len(uniques), np.nan)
    for i, u in enumerate(uniques.tolist()):
        m = ISO_DATE.match(u)
        try:
            if m:
                parsed[i] = (date(int(m[1]), int(m[2]), int(m[3])) - EPOCH).days
            elif weeks and (w := ISO_WEEK.match(u)):
                parsed[i] = (date.fromisocalendar(int(w[1]), int(w[2]), 1) - EPOCH).days
        except ValueError:
            pass
    return parsed


def _floats(text: NDArray[np.object_]) -> NDArray[np.float64]:
    """Numbers of ``text`` as pandas reads them (NaN when not a number)."""
    if not text.size:
        return np.zeros(0)
    joined = "".join(text.tolist())
    if joined.isascii() and "_" not in joined:  # where float() and pandas agree
        try:
            return text.astype(np.float64)
        except ValueError:
            pass
    return np.array(pd.to_numeric(pd.Series(text, dtype=object), errors="coerce"),
                    dtype=np.float64)


def _grouping(decimal: str, thousands: str) -> re.Pattern[str]:
    sep = "[ \u00a0\u202f]" if thousands == " " else re.escape(thousands)
    return re.compile(
        rf"^[+-]?\d{{1,3}}(?:{sep}\d{{3}})+(?:{re.escape(decimal)}\d*)?(?:[eE][+-]?\d+)?$"
    )


def parse_numbers(
    text: NDArray[np.object_], *, decimal: str = ".", thousands: str | None = None
) -> tuple[NDArray[np.float64], NDArray[np.int8]]:
    """Values of number strings written with ``decimal`` and ``thousands``, and a problem code.

    Problem codes: 0 none (the value may still be NaN or infinite), :data:`AMBIGUOUS` (the
    string uses a separator the feed declares neither as decimal mark nor as thousands
    separator: ``1,5`` with ``decimal: "."``, ``1.234,5`` with ``decimal: ","`` alone),
    :data:`BAD_GROUPING` (thousands separators not between groups of three digits, or after the
    decimal mark). Meant for distinct values (see :class:`~server.feeds.parser.Coded`).
    """
    other = "," if decimal == "." else "."
    problem = np.zeros(text.size, dtype=np.int8)
    if decimal == "." and thousands is None:
        values = _floats(text)
        failed = np.flatnonzero(np.isnan(values))
        problem[failed] = [AMBIGUOUS if "," in u else 0 for u in text[failed].tolist()]
        return values, problem
    grouped = _grouping(decimal, thousands) if thousands is not None else None
    marks = {thousands} | ({"\u00a0", "\u202f"} if thousands == " " else set())
    canonical = np.empty(text.size, dtype=object)
    for i, u in enumerate(text.tolist()):
        if grouped is not None and any(t in u for t in marks):
            if not grouped.match(u):
                problem[i], canonical[i] = BAD_GROUPING, ""
                continue
            for t in marks:
                u = u.replace(t, "")
        if other in u:
            problem[i], canonical[i] = AMBIGUOUS, ""
            continue
        canonical[i] = u.replace(decimal, ".")
    values = _floats(canonical)
    values[problem != 0] = np.nan
    return values, problem


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
    day = cols["date"].map(lambda u: _days_of(u, weeks=weeks))
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


def check_file(
    accepted: Accepted, *, positives: int | None, tests: int | None, unit: str = "line"
) -> FileCheck:
    """Whole-file checks on rows that passed: duplicates, conflicts, positives above tests."""
    n = len(accepted)
    keep = np.ones(n, dtype=bool)
    lines: list[int] = []
    reasons: list[str] = []
    messages: list[str] = []
    if n == 0:
        return FileCheck(keep=keep, lines=np.zeros(0, np.int64), reasons=(), messages=())
    order = np.lexsort((accepted.line, accepted.day, accepted.measure_id, accepted.region_id))
    r, m, d = accepted.region_id[order], accepted.measure_id[order], accepted.day[order]
    same = (r[1:] == r[:-1]) & (m[1:] == m[:-1]) & (d[1:] == d[:-1])
    if same.any():
        start = np.r_[True, ~same]
        group = np.cumsum(start) - 1
        sizes = np.bincount(group)
        v = accepted.value[order]
        first = np.flatnonzero(start)
        vmin = np.minimum.reduceat(v, first)
        vmax = np.maximum.reduceat(v, first)
        for g in np.flatnonzero(sizes > 1).tolist():
            members = order[first[g]:first[g] + sizes[g]]
            member_lines = accepted.line[members]
            if vmin[g] == vmax[g]:
                for k in members[1:].tolist():
                    keep[k] = False
                    lines.append(int(accepted.line[k]))
                    reasons.append("duplicate_row")
                    messages.append(f"repeats {unit} {int(member_lines[0])}, which was kept")
            else:
                said = ", ".join(
                    f"{unit} {int(ln)} says {val:g}"
                    for ln, val in zip(member_lines, accepted.value[members], strict=True)
                )
                for k in members.tolist():
                    keep[k] = False
                    lines.append(int(accepted.line[k]))
                    reasons.append("conflicting_duplicate")
                    messages.append(f"the same region, measure and date disagree: {said}")
    if positives is not None and tests is not None:
        _positives_over_tests(accepted, keep, positives, tests, lines, reasons, messages, unit)
    return FileCheck(
        keep=keep, lines=np.asarray(lines, dtype=np.int64), reasons=tuple(reasons),
        messages=tuple(messages),
    )


def _positives_over_tests(
    a: Accepted, keep: NDArray[np.bool_], positives: int, tests: int,
    lines: list[int], reasons: list[str], messages: list[str], unit: str = "line",
) -> None:
    key = a.region_id * 1_000_000 + a.day
    p = np.flatnonzero(keep & (a.measure_id == positives))
    t = np.flatnonzero(keep & (a.measure_id == tests))
    if p.size == 0 or t.size == 0:
        return
    t_sorted = t[np.argsort(key[t], kind="stable")]
    pos = np.searchsorted(key[t_sorted], key[p])
    pos = np.minimum(pos, t_sorted.size - 1)
    match = key[t_sorted[pos]] == key[p]
    p, q = p[match], t_sorted[pos[match]]
    over = a.value[p] > a.value[q]
    for i, j in zip(p[over].tolist(), q[over].tolist(), strict=True):
        text = (f"positives {a.value[i]:g} ({unit} {int(a.line[i])}) exceed tests "
                f"{a.value[j]:g} ({unit} {int(a.line[j])}) for the same region and date")
        for k in (i, j):
            keep[k] = False
            lines.append(int(a.line[k]))
            reasons.append("positives_exceed_tests")
            messages.append(text)


def unpaired(
    accepted: Accepted, keep: NDArray[np.bool_], *, measure: int, other: int
) -> NDArray[np.int64]:
    """Rows of ``measure`` still kept whose region and date have no kept row of ``other``."""
    key = accepted.region_id * 1_000_000 + accepted.day
    mine = np.flatnonzero(keep & (accepted.measure_id == measure))
    theirs = key[keep & (accepted.measure_id == other)]
    return mine[~np.isin(key[mine], theirs)]


def check_stored_pairs(
    accepted: Accepted, keep: NDArray[np.bool_], *, positives: int, tests: int,
    stored_positives: StoredValues, stored_tests: StoredValues, unit: str = "line",
) -> FileCheck:
    """Positives above tests where the file gives one measure and the store holds the other.

    ``stored_*`` are the newest stored values for the file's unpaired rows (see
    :func:`unpaired`). Only the file's row is rejected (``positives_exceed_tests``); the stored
    value stays. ``keep`` is updated in place.
    """
    lines: list[int] = []
    messages: list[str] = []
    key = accepted.region_id * 1_000_000 + accepted.day
    for mine, other, stored in ((positives, tests, stored_tests),
                                (tests, positives, stored_positives)):
        rows = unpaired(accepted, keep, measure=mine, other=other)
        if rows.size == 0 or len(stored) == 0:
            continue
        stored_key = stored.region_id * 1_000_000 + stored.day
        order = np.argsort(stored_key, kind="stable")
        pos = np.minimum(np.searchsorted(stored_key[order], key[rows]), order.size - 1)
        match = stored_key[order][pos] == key[rows]
        rows, at = rows[match], order[pos[match]]
        file_value, store_value = accepted.value[rows], stored.value[at]
        over = file_value > store_value if mine == positives else store_value > file_value
        for i, j in zip(rows[over].tolist(), at[over].tolist(), strict=True):
            keep[i] = False
            lines.append(int(accepted.line[i]))
            if mine == positives:
                text = (f"positives {accepted.value[i]:g} ({unit} {int(accepted.line[i])}) exceed "
                        f"tests {stored.value[j]:g} already stored (vintage "
                        f"{int(stored.vintage_id[j])}) for the same region and date")
            else:
                text = (f"positives {stored.value[j]:g} already stored (vintage "
                        f"{int(stored.vintage_id[j])}) exceed tests {accepted.value[i]:g} "
                        f"({unit} {int(accepted.line[i])}) for the same region and date")
            messages.append(text)
    return FileCheck(
        keep=keep, lines=np.asarray(lines, dtype=np.int64),
        reasons=("positives_exceed_tests",) * len(lines), messages=tuple(messages),
    )
