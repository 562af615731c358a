"""Dates and numbers read from the text of feed values, one distinct value at a time.

An ISO week is stored on its Monday. Numbers are written with the feed's ``decimal`` mark and
``thousands`` separator; a string that uses a separator the feed declares as neither is
:data:`AMBIGUOUS`, thousands separators not between groups of three digits :data:`BAD_GROUPING`.
"""

from __future__ import annotations

import re
from datetime import date

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from server.feeds.chunks import Coded

EPOCH = date(1970, 1, 1)
ISO_DATE = re.compile(r"^([0-9]{4})-([0-9]{2})-([0-9]{2})$")  # ASCII digits only
ISO_WEEK = re.compile(r"^([0-9]{4})-?W([0-9]{2})$")
AMBIGUOUS, BAD_GROUPING = 1, 2


def day_numbers(text: NDArray[np.object_], *, weeks: bool) -> NDArray[np.float64]:
    """Days since 1970-01-01 of ISO dates (and ISO weeks when ``weeks``); NaN when unparsable."""
    coded = Coded.of(text, strip=False)
    return coded.map(lambda u: days_of(u, weeks=weeks)).astype(np.float64)


def days_of(uniques: NDArray[np.object_], *, weeks: bool) -> NDArray[np.float64]:
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
    decimal mark). Meant for distinct values (see :class:`~server.feeds.chunks.Coded`).
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
