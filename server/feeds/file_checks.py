"""Whole-file checks over the rows that passed the row checks (:mod:`server.feeds.validation`).

``duplicate_row`` (same key and value as an earlier line, which is kept), ``conflicting_duplicate``
(same key, different values: every such line is rejected), ``positives_exceed_tests`` (both lines
rejected); and, with values read from the store, ``positives_exceed_tests`` for a file's
positives (tests) whose tests (positives) for that region and date are only stored
(:func:`check_stored_pairs`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from server.feeds.validation import Accepted
from server.store.reads import StoredValues


@dataclass(frozen=True, kw_only=True)
class FileCheck:
    """Outcome of the whole-file checks: which accepted rows to keep, and why others went."""

    keep: NDArray[np.bool_]
    lines: NDArray[np.int64]
    reasons: tuple[str, ...]
    messages: tuple[str, ...]


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
