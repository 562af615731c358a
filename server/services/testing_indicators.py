"""The ``testing_change`` indicator: the testing change known on each day, for every district.

Its value on a day is the number of days since the first day of the latest testing change known
that day (0 on that day; missing while none is known), from
:func:`server.indicators.testing_known.testing_changes_as_known` on the district's tests and
positives up to that day only. ``size`` carries the tests' factor (after / before) and
``lower``/``upper`` its interval, which the explanation writes ("tests rose 60% from ...").
A policy's ``testing_hold`` reads it (``docs/rules.md``, "Testing changes").

Changes an analyst dismissed (:mod:`server.services.testing_reviews`, read into
``DistrictData.testing_dismissals``) are no longer known from the office day of the dismissal
on; the days before keep them as they were known then (as-known reproducibility).
"""

from __future__ import annotations

import numpy as np

from rules import IndicatorSeries
from server.indicators.testing_known import testing_changes_as_known
from server.services.district_data import DistrictData

__all__ = ["dismissal_indices", "testing_change_series"]


def dismissal_indices(d: DistrictData) -> list[tuple[int, int, int]]:
    """The dismissals of ``d`` as (region, change day, from day) indices into its arrays (a
    dismissal after the last day is left out; one before the first applies from day 0)."""
    index = {code: i for i, code in enumerate(d.regions)}
    first = d.dates[0].astype("datetime64[D]") if d.dates.size else None
    out = []
    for code, change, on in d.testing_dismissals:
        if code not in index or first is None:
            continue
        change_i = int((np.datetime64(change, "D") - first).astype(int))
        on_i = max(int((np.datetime64(on, "D") - first).astype(int)), 0)
        if on_i < d.dates.size:
            out.append((index[code], change_i, on_i))
    return out


def testing_change_series(d: DistrictData, ind: object) -> IndicatorSeries:
    """The ``testing_change`` kind's builder (``ind``: the resolved indicator)."""
    params = ind.params  # type: ignore[attr-defined]
    tests = d.district[str(params["denominator"])]
    positives = d.district[ind.measure]  # type: ignore[attr-defined]
    with np.errstate(invalid="ignore"):
        over = positives > tests  # a pair no check let through together: unusable
    if over.any():
        positives, tests = np.where(over, np.nan, positives), np.where(over, np.nan, tests)
    known = testing_changes_as_known(
        tests, positives, compare=int(params["compare"]), min_days=int(params["min_days"]),
        min_ratio=float(params["min_ratio"]), separation=int(params["separation"]),
        dismissed=dismissal_indices(d))
    return IndicatorSeries(estimate=known.since, size=known.tests_ratio,
                           lower=known.tests_ratio_lower, upper=known.tests_ratio_upper)
