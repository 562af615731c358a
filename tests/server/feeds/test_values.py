"""Dates and numbers read from feed values: ISO 8601 dates and weeks, decimal marks and grouping."""

from __future__ import annotations

import numpy as np
import pytest

from server.feeds.values import AMBIGUOUS, BAD_GROUPING, day_numbers, parse_numbers


def test_day_numbers_iso_week_only_for_weekly() -> None:
    text = np.asarray(["2026-W01", "2026-01-05", "2026-W54"], dtype=object)
    # ISO 8601: 2026-W01 starts Monday 29 December 2025; 2026 has 53 weeks at most.
    expected = (np.datetime64("2025-12-29") - np.datetime64("1970-01-01")).astype(int)
    got = day_numbers(text, weeks=True)
    assert got[0] == expected and np.isnan(got[2])
    assert np.isnan(day_numbers(text, weeks=False)[0])


@pytest.mark.parametrize(
    ("decimal", "thousands", "text", "value", "problem"),
    [
        pytest.param(".", None, "12.5", 12.5, 0, id="point"),
        pytest.param(".", None, "1,5", np.nan, AMBIGUOUS, id="comma-in-point-feed"),
        pytest.param(".", None, "1.234.5", np.nan, 0, id="not-a-number"),
        pytest.param(",", None, "12,5", 12.5, 0, id="comma"),
        pytest.param(",", None, "-0,25e2", -25.0, 0, id="comma-exponent"),
        pytest.param(",", None, "1.234,5", np.nan, AMBIGUOUS, id="grouped-without-thousands"),
        pytest.param(",", None, "1.234", np.nan, AMBIGUOUS, id="point-in-comma-feed"),
        pytest.param(",", ".", "1.234,5", 1234.5, 0, id="grouped"),
        pytest.param(",", ".", "12.345.678", 12345678.0, 0, id="grouped-integer"),
        pytest.param(",", ".", "1234,5", 1234.5, 0, id="ungrouped-allowed"),
        pytest.param(",", ".", "12.34,5", np.nan, BAD_GROUPING, id="group-of-two"),
        pytest.param(",", ".", "1,234.5", np.nan, BAD_GROUPING, id="separator-after-mark"),
        pytest.param(".", ",", "1,234.5", 1234.5, 0, id="point-with-comma-groups"),
        pytest.param(".", ",", "1,5", np.nan, BAD_GROUPING, id="comma-group-of-one"),
        pytest.param(",", " ", "1\u00a0234,5", 1234.5, 0, id="no-break-space"),
        pytest.param(".", "'", "1'234.5", 1234.5, 0, id="apostrophe"),
    ],
)
def test_parse_numbers_decimal_and_thousands(
    decimal: str, thousands: str | None, text: str, value: float, problem: int
) -> None:
    # Conventions as in CLDR number formats (common practice, no source for the choice of
    # which mixtures count as ambiguous: that is tierwise's rule, see docs/feeds.md).
    values, problems = parse_numbers(np.asarray([text], dtype=object), decimal=decimal,
                                     thousands=thousands)
    assert problems.tolist() == [problem]
    np.testing.assert_equal(values, [value])
