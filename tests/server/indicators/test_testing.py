"""Testing changes: a step up in tests with falling positivity is flagged; no step, no flag."""

from __future__ import annotations

import numpy as np
import pytest

from server.indicators.testing import detect_testing_changes

WEEKDAY = np.array([1.15, 1.1, 1.05, 1.05, 1.0, 0.75, 0.55])


def _tests(seed: int, change: int | None, n: int = 150) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    cases = 80 * np.exp(0.005 * t)
    negatives = np.full(n, 3000.0)
    if change is not None:
        cases[change:] *= 1.6  # wider testing finds more cases ...
        negatives[change:] *= 2.8  # ... among many more negative tests
    pos = rng.poisson(cases * WEEKDAY[t % 7]).astype(float)
    neg = rng.poisson(negatives * WEEKDAY[t % 7]).astype(float)
    return pos + neg, pos


def test_detect_testing_changes_flags_wider_testing() -> None:
    tests, pos = _tests(1, 90)
    res = detect_testing_changes(tests, pos, population=2e6)
    days = res.flagged_days(0)
    assert len(days) == 1 and abs(days[0] - 90) <= 1
    k = list(res.day[0]).index(days[0])
    assert res.tests_ratio_lower[0, k] > 2.0
    assert res.positivity_odds_upper[0, k] < 1.0
    assert res.positivity_after[0, k] < res.positivity_before[0, k]


def test_detect_testing_changes_quiet_without_a_change() -> None:
    flags = []
    for seed in range(10):
        tests, pos = _tests(seed, None)
        flags.append(len(detect_testing_changes(tests, pos, population=2e6).flagged_days(0)))
    assert sum(flags) == 0


def test_detect_testing_changes_refuses_more_positives_than_tests() -> None:
    tests, pos = _tests(2, None)
    pos[7] = tests[7] + 1
    with pytest.raises(ValueError, match="positives: .* exceeds tests"):
        detect_testing_changes(tests, pos, population=2e6)
