"""Stored values the indicators cannot take: found, read as missing, and reported.

A count must be a whole number in ``[0, MAX_COUNT]`` (within
:data:`~server.feeds.validation.COUNT_TOLERANCE` of one it is rounded, as feed validation stores
it); other measures must be finite and not negative. :func:`usable` applies this to any array;
:func:`clean_arrays` to each measure read for the districts (:mod:`server.services.district_data`)
and lists what it dropped as :class:`BadValue`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date

import numpy as np
from numpy.typing import NDArray

from server.feeds.validation import COUNT_TOLERANCE, MAX_COUNT


@dataclass(frozen=True, kw_only=True)
class BadValue:
    """A stored value the indicators cannot take, read as missing (and logged)."""

    region: str
    measure: str
    ref_date: date
    value: float
    problem: str


def usable(
    values: NDArray[np.float64], *, count: bool
) -> tuple[NDArray[np.float64], NDArray[np.bool_], NDArray[np.str_]]:
    """``values`` with unusable entries made NaN, where they were, and why (``""``: fine).

    Counts must be whole numbers in ``[0, MAX_COUNT]``; those within ``COUNT_TOLERANCE`` of one
    are rounded to it (as feed validation stores them). Other measures must be finite and not
    negative. NaN stays NaN (a missing day).
    """
    problem = np.full(values.shape, "", dtype="<U40")
    with np.errstate(invalid="ignore"):
        problem[np.isinf(values)] = "not finite"
        problem[(values < 0) & (problem == "")] = "negative"
        if count:
            whole = np.rint(values)
            problem[(np.abs(values - whole) > COUNT_TOLERANCE) & (problem == "")] = (
                "not a whole number")
            problem[(values > MAX_COUNT) & (problem == "")] = "over the largest count"
    bad = problem != ""
    cleaned = np.where(bad, np.nan, np.rint(values) + 0.0 if count else values)
    return cleaned, bad, problem


def clean_arrays(
    arrays: Mapping[str, NDArray[np.float64]], regions: Sequence[str],
    dates: NDArray[np.datetime64], *, count: bool, found: list[BadValue],
) -> tuple[dict[str, NDArray[np.float64]], dict[str, NDArray[np.bool_]]]:
    """:func:`usable` over each measure's (regions, days) array; bad values go to ``found``."""
    values, masks = {}, {}
    for measure, arr in arrays.items():
        values[measure], masks[measure], problem = usable(arr, count=count)
        for r, d in np.argwhere(masks[measure]).tolist():
            found.append(BadValue(region=regions[r], measure=measure,
                                  ref_date=dates[d].astype("datetime64[D]").item(),
                                  value=float(arr[r, d]), problem=str(problem[r, d])))
    return values, masks
