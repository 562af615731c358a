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
missing_value          the value is empty
non_numeric_value      the value is not a finite number
negative_count         a count measure below zero
non_integer_count      a count measure with a fractional value
out_of_range           outside the plausible range set for the measure in the feed
=====================  ==============================================================

File checks (over all rows that passed, see :func:`check_file`): ``duplicate_row`` (same key and
value as an earlier line, which is kept), ``conflicting_duplicate`` (same key, different values:
every such line is rejected), ``positives_exceed_tests`` (both lines rejected).

An ISO week is stored on its Monday. Values are multiplied by the measure's ``scale`` before the
count and range checks.
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
from server.feeds.parser import RawChunk
from server.store.vintages import Rejection

EPOCH = date(1970, 1, 1)
Messages = Callable[[NDArray[np.int64]], list[str]]
ISO_DATE = re.compile(r"^(\d{4})-(\d{2})-(\d{2})$")
ISO_WEEK = re.compile(r"^(\d{4})-?W(\d{2})$")
REASONS = (
    "malformed_row", "unknown_region", "unknown_measure", "unparsable_date", "future_date",
    "missing_value", "non_numeric_value", "negative_count", "non_integer_count", "out_of_range",
    "duplicate_row", "conflicting_duplicate", "positives_exceed_tests",
)


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
    codes, uniques = pd.factorize(text)
    parsed = np.full(len(uniques), np.nan)
    for i, u in enumerate(uniques):
        m = ISO_DATE.match(u)
        try:
            if m:
                parsed[i] = (date(int(m[1]), int(m[2]), int(m[3])) - EPOCH).days
            elif weeks and (w := ISO_WEEK.match(u)):
                parsed[i] = (date.fromisocalendar(int(w[1]), int(w[2]), 1) - EPOCH).days
        except ValueError:
            pass
    return parsed[codes] if len(uniques) else np.zeros(0)


def _lookup(text: NDArray[np.object_], mapping: Mapping[str, int]) -> NDArray[np.float64]:
    codes, uniques = pd.factorize(text)
    ids = np.asarray([mapping.get(u, np.nan) for u in uniques], dtype=np.float64)
    return ids[codes] if len(uniques) else np.zeros(0)


def _long_form(chunk: RawChunk, feed: FeedDefinition) -> tuple[dict[str, NDArray], NDArray]:
    """Columns region, date, measure (feed's measure name), value; and row -> chunk row index."""
    c = feed.columns
    cols = chunk.columns
    n = len(chunk)
    if feed.layout == "long":
        by_source = {m.source: m.measure for m in feed.measures}
        codes, uniques = pd.factorize(cols[c.measure])
        names = np.asarray([by_source.get(u, "\x00" + u) for u in uniques], dtype=object)
        measure = names[codes] if len(uniques) else cols[c.measure]
        return (
            {"region": cols[c.region], "date": cols[c.date], "measure": measure,
             "value": cols[c.value]},
            np.arange(n),
        )
    parts_index, parts_measure, parts_value = [], [], []
    for m in feed.measures:
        values = cols[m.source]
        present = np.flatnonzero(values != "")
        parts_index.append(present)
        parts_measure.append(np.full(present.size, m.measure, dtype=object))
        parts_value.append(values[present])
    index = np.concatenate(parts_index)
    order = np.argsort(index, kind="stable")
    index = index[order]
    return (
        {"region": cols[c.region][index], "date": cols[c.date][index],
         "measure": np.concatenate(parts_measure)[order],
         "value": np.concatenate(parts_value)[order]},
        index,
    )


def validate_chunk(
    chunk: RawChunk, feed: FeedDefinition, catalogue: Catalogue, *, today: date
) -> ChunkResult:
    """Apply the row checks to ``chunk``; returns accepted arrays and rejections."""
    blank = np.asarray([not str(r).strip() for r in chunk.raw], dtype=bool) & ~chunk.malformed
    keep_rows = np.flatnonzero(~blank)
    sub = RawChunk(
        columns={k: v[keep_rows] for k, v in chunk.columns.items()}, lines=chunk.lines[keep_rows],
        raw=chunk.raw[keep_rows], malformed=chunk.malformed[keep_rows],
    )
    cols, row = _long_form(sub, feed)
    n = row.size
    reason = np.full(n, "", dtype=object)
    detail = np.full(n, "", dtype=object)

    def flag(mask: NDArray[np.bool_], code: str, text: Messages) -> None:
        new = np.flatnonzero(mask & (reason == ""))
        if new.size:
            reason[new] = code
            detail[new] = text(new)

    def quoted(values: NDArray[np.object_]) -> Messages:
        return lambda idx: [repr(str(v)[:80]) for v in values[idx]]

    def fixed(message: str) -> Messages:
        return lambda idx: [message] * idx.size

    def framed(
        before: str, values: NDArray[np.object_], after: str
    ) -> Messages:
        return lambda idx: [f"{before}{v}{after}" for v in quoted(values)(idx)]

    flag(sub.malformed[row], "malformed_row",
         fixed("more fields than the header, or an open quote"))
    region_code = cols["region"]
    if feed.regions:
        codes, uniques = pd.factorize(region_code)
        mapped = np.asarray([feed.regions.get(u, u) for u in uniques], dtype=object)
        region_code = mapped[codes] if len(uniques) else region_code
    region_id = _lookup(region_code, catalogue.regions)
    flag(np.isnan(region_id), "unknown_region", framed("unknown region code ", cols["region"], ""))
    measure = cols["measure"]
    measure_id = _lookup(measure, catalogue.measures)
    flag(np.isnan(measure_id), "unknown_measure", lambda idx: [
        f"measure {str(m).lstrip(chr(0))[:80]!r} is not carried by feed {feed.name!r}"
        for m in measure[idx]
    ])
    day = day_numbers(cols["date"], weeks=feed.cadence == "weekly")
    expect = "YYYY-MM-DD or YYYY-Www" if feed.cadence == "weekly" else "YYYY-MM-DD"
    flag(np.isnan(day), "unparsable_date",
         framed("date ", cols["date"], f" is not a date ({expect})"))
    today_n = (today - EPOCH).days
    with np.errstate(invalid="ignore"):
        flag(day > today_n, "future_date", framed("date ", cols["date"], " is in the future"))
    raw_value = cols["value"]
    flag(raw_value == "", "missing_value", fixed("the value is empty"))
    value = pd.to_numeric(pd.Series(raw_value, dtype=object), errors="coerce").to_numpy(
        dtype=np.float64
    )
    flag(~np.isfinite(value), "non_numeric_value", framed("value ", raw_value, " is not a number"))
    scale = np.ones(n)
    low = np.full(n, -np.inf)
    high = np.full(n, np.inf)
    is_count = np.zeros(n, dtype=bool)
    for m in feed.measures:
        pick = measure == m.measure
        scale[pick] = m.scale
        low[pick] = -np.inf if m.minimum is None else m.minimum
        high[pick] = np.inf if m.maximum is None else m.maximum
        is_count[pick] = m.measure in catalogue.counts
    with np.errstate(invalid="ignore", over="ignore"):
        value = value * scale
        flag(is_count & (value < 0), "negative_count",
             framed("a count cannot be negative: ", raw_value, ""))
        flag(is_count & (np.abs(value - np.rint(value)) > 1e-9), "non_integer_count",
             framed("a count must be a whole number: ", raw_value, ""))
        flag((value < low) | (value > high), "out_of_range", lambda idx: [
            f"value {str(v)[:80]!r} is outside the plausible range [{a:g}, {b:g}]"
            for v, a, b in zip(raw_value[idx], low[idx], high[idx], strict=True)
        ])
    bad = reason != ""
    good = ~bad
    accepted = Accepted(
        region_id=region_id[good].astype(np.int64), measure_id=measure_id[good].astype(np.int64),
        day=day[good].astype(np.int64), value=value[good], line=sub.lines[row[good]],
    )
    rejections = _rejections(sub, row[bad], reason[bad], detail[bad])
    return ChunkResult(accepted=accepted, rejections=rejections, skipped_blank=int(blank.sum()))


def _rejections(
    sub: RawChunk, rows: NDArray[np.int64], reasons: NDArray[np.object_],
    details: NDArray[np.object_],
) -> list[Rejection]:
    out: list[Rejection] = []
    seen: set[tuple[int, str]] = set()
    for r, code, text in zip(rows.tolist(), reasons.tolist(), details.tolist(), strict=True):
        line = int(sub.lines[r])
        if (line, code) in seen:  # wide rows: one rejection per line and reason
            continue
        seen.add((line, code))
        out.append(Rejection(line=line, raw=str(sub.raw[r])[:2000], reason=code, message=text))
    return out


def check_file(accepted: Accepted, *, positives: int | None, tests: int | None) -> FileCheck:
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
                    messages.append(f"repeats line {int(member_lines[0])}, which was kept")
            else:
                said = ", ".join(
                    f"line {int(ln)} says {val:g}"
                    for ln, val in zip(member_lines, accepted.value[members], strict=True)
                )
                for k in members.tolist():
                    keep[k] = False
                    lines.append(int(accepted.line[k]))
                    reasons.append("conflicting_duplicate")
                    messages.append(f"the same region, measure and date disagree: {said}")
    if positives is not None and tests is not None:
        _positives_over_tests(accepted, keep, positives, tests, lines, reasons, messages)
    return FileCheck(
        keep=keep, lines=np.asarray(lines, dtype=np.int64), reasons=tuple(reasons),
        messages=tuple(messages),
    )


def _positives_over_tests(
    a: Accepted, keep: NDArray[np.bool_], positives: int, tests: int,
    lines: list[int], reasons: list[str], messages: list[str],
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
        text = (f"positives {a.value[i]:g} (line {int(a.line[i])}) exceed tests "
                f"{a.value[j]:g} (line {int(a.line[j])}) for the same region and date")
        for k in (i, j):
            keep[k] = False
            lines.append(int(a.line[k]))
            reasons.append("positives_exceed_tests")
            messages.append(text)
