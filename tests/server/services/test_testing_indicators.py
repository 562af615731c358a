"""The ``testing_change`` kind: registered, built from tests and positives, dismissals as known."""

from __future__ import annotations

from datetime import date

import numpy as np
import pytest

from rules import FieldError, IndicatorSpec
from server.indicators.testing_known import testing_changes_as_known as known_changes
from server.services.district_data import DistrictData
from server.services.indicator_kinds import KINDS, check_indicator, resolve

WEEKDAY = np.array([1.15, 1.1, 1.05, 1.05, 1.0, 0.75, 0.55])
START = np.datetime64("2031-01-05")
DAYS, CHANGE = 120, 80


def _data(dismissals: tuple[tuple[str, date, date], ...] = ()) -> DistrictData:
    rng = np.random.default_rng(8)
    t = np.arange(DAYS)
    pos = rng.poisson(np.where(t < CHANGE, 60.0, 96.0) * WEEKDAY[t % 7]).astype(float)
    neg = rng.poisson(np.where(t < CHANGE, 2000.0, 5600.0) * WEEKDAY[t % 7]).astype(float)
    pos[-1] = np.nan  # the newest day's report still missing
    return DistrictData(
        regions=("D1", "D2"), levels=("district", "district"), population=np.array([2e5, 1e5]),
        dates=START + np.arange(DAYS),
        district={"tests": np.vstack([pos + neg, pos + neg]),
                  "positives": np.vstack([pos, pos])},
        area_of_district={}, plant={}, plant_population=np.zeros(0), served=np.zeros((2, 0)),
        as_of=None, testing_dismissals=dismissals,
    )


def _built(data: DistrictData):  # type: ignore[no-untyped-def]
    spec = IndicatorSpec(name="testing_change", label="testing change", kind="testing_change")
    ind = resolve(spec)
    assert ind is not None
    return KINDS["testing_change"].build(data, ind)


def test_the_kind_is_registered_with_checked_parameters() -> None:
    kind = KINDS["testing_change"]
    assert kind.default_measure == "positives" and kind.param("denominator").default == "tests"
    with pytest.raises(FieldError, match="params.min_days: 5 is more than compare 4"):
        check_indicator(IndicatorSpec(name="t", label="t", kind="testing_change",
                                      params={"min_days": 5, "compare": 4}))
    with pytest.raises(FieldError, match="min_ratio"):
        check_indicator(IndicatorSpec(name="t", label="t", kind="testing_change",
                                      params={"min_ratio": 0.9}))


def test_the_series_is_days_since_the_change_with_its_size() -> None:
    data = _data()
    series = _built(data)
    k = known_changes(data.district["tests"], data.district["positives"])
    np.testing.assert_array_equal(series.estimate, k.since)
    np.testing.assert_array_equal(series.size, k.tests_ratio)
    day = CHANGE + 10
    assert series.estimate[0, day] == pytest.approx(10, abs=1)
    assert 2.0 < series.size[0, day] < 3.5  # (96 + 5600) / (60 + 2000) = 2.77 in expectation
    assert np.isnan(series.estimate[0, CHANGE - 5])  # nothing known before the change


def test_a_dismissal_counts_from_its_office_day_for_its_district_only() -> None:
    first = _built(_data())
    found = START + int(CHANGE - first.estimate[0, CHANGE + 10] + 10)
    change_day = found.astype(object)
    on = (START + CHANGE + 12).astype(object)
    series = _built(_data((("D1", change_day, on),)))
    np.testing.assert_array_equal(series.estimate[0, : CHANGE + 12],
                                  first.estimate[0, : CHANGE + 12])
    assert np.all(np.isnan(series.estimate[0, CHANGE + 12 :]))
    np.testing.assert_array_equal(series.estimate[1], first.estimate[1])
