"""Testing changes as known on each day: causal, flagged within days, sized, dismissible.

The intervals are checked against statsmodels: the log ratio of tests with dispersion 1 is the
coefficient of a Poisson GLM of the two window sums on an indicator (its standard error
``sqrt(1/A + 1/B)``; Agresti 2013, "Categorical Data Analysis", 3rd ed., sec. 3.3 on the
Poisson log-linear model), and the positivity odds ratio is Woolf's (Woolf 1955) as
``statsmodels.stats.contingency_tables.Table2x2`` computes it on the four cells plus 0.5.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.stats.contingency_tables import Table2x2

from server.indicators.testing_known import testing_changes_as_known as known_changes

WEEKDAY = np.array([1.15, 1.1, 1.05, 1.05, 1.0, 0.75, 0.55])


def _tests(seed: int, change: int | None, n: int = 150, wider: bool = True
           ) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    cases = 80 * np.exp(0.005 * t)
    negatives = np.full(n, 3000.0)
    if change is not None:
        f_cases, f_neg = (1.6, 2.8) if wider else (1 / 1.6, 1 / 2.8)
        cases[change:] *= f_cases
        negatives[change:] *= f_neg
    pos = rng.poisson(cases * WEEKDAY[t % 7]).astype(float)
    neg = rng.poisson(negatives * WEEKDAY[t % 7]).astype(float)
    return (pos + neg)[None, :], pos[None, :]


def test_a_step_up_is_known_within_three_days_with_its_date_and_size() -> None:
    tests, pos = _tests(1, 90)
    k = known_changes(tests, pos)
    known = np.flatnonzero(k.change_day[0] >= 0)
    assert known.size and 90 <= known[0] <= 92  # flagged by the change's third day
    assert np.all(k.change_day[0, :known[0]] == -1)
    assert abs(k.change_day[0, 100] - 90) <= 1  # the date settles on the step
    # the expected tests of the 7 days from the change over the mean of the same weekdays one
    # and two weeks before (about (80 * 1.6 + 3000 * 2.8) / (80 + 3000) = 2.77, less the growth)
    t = np.arange(150)
    mean = (80 * np.exp(0.005 * t) * np.where(t >= 90, 1.6, 1.0)
            + np.where(t >= 90, 8400.0, 3000.0)) * WEEKDAY[t % 7]
    truth = mean[90:97].sum() * 2 / (mean[83:90].sum() + mean[76:83].sum())
    assert k.change_day[0, 100] == 90
    assert k.tests_ratio_lower[0, 100] < k.tests_ratio[0, 100] < k.tests_ratio_upper[0, 100]
    # coverage of that truth over 300 series (simulated truth; 95 % intervals)
    rows = [_tests(seed, 90) for seed in range(100, 400)]
    many = known_changes(np.vstack([r[0] for r in rows]), np.vstack([r[1] for r in rows]))
    assert np.all(many.change_day[:, 100] == 90)
    covered = (many.tests_ratio_lower[:, 100] < truth) & (truth < many.tests_ratio_upper[:, 100])
    assert 0.9 <= covered.mean() <= 0.99
    assert k.odds_ratio[0, 100] < 1
    assert k.since[0, 100] == 100 - k.change_day[0, 100]
    assert np.isnan(k.since[0, 80])


def test_a_step_down_is_known_too() -> None:
    tests, pos = _tests(2, 90, wider=False)
    k = known_changes(tests, pos)
    assert abs(k.change_day[0, 97] - 90) <= 1
    assert k.tests_ratio_upper[0, 97] < 1 / 1.2
    assert k.odds_ratio[0, 97] > 1


def test_no_change_no_flag_over_many_series() -> None:
    rows = [_tests(seed, None) for seed in range(40)]
    k = known_changes(np.vstack([r[0] for r in rows]), np.vstack([r[1] for r in rows]))
    assert (k.change_day >= 0).sum() == 0


def test_a_rise_of_tests_with_positivity_rising_too_is_no_testing_change() -> None:
    # an epidemic rise: more people ill, more tests, a larger share positive
    rng = np.random.default_rng(5)
    t = np.arange(150)
    cases = np.where(t < 90, 200.0, 800.0)
    neg = np.where(t < 90, 3000.0, 3600.0)
    pos = rng.poisson(cases * WEEKDAY[t % 7]).astype(float)
    tests = pos + rng.poisson(neg * WEEKDAY[t % 7])
    k = known_changes(tests[None, :], pos[None, :])
    assert (k.change_day >= 0).sum() == 0


def test_each_day_depends_on_the_days_up_to_it_only() -> None:
    tests, pos = _tests(3, 90)
    full = known_changes(tests, pos)
    for cut in (60, 91, 92, 95, 120):
        part = known_changes(tests[:, : cut + 1], pos[:, : cut + 1])
        np.testing.assert_array_equal(part.change_day[0], full.change_day[0, : cut + 1])
        np.testing.assert_allclose(part.tests_ratio[0], full.tests_ratio[0, : cut + 1])


def test_a_series_shorter_than_the_compare_window_knows_no_change() -> None:
    """A database of a few days (a fresh install, an early as-known morning): no change is
    known, the same days as a longer series has (the cut test above, down to 1 day)."""
    tests, pos = _tests(3, 90)
    full = known_changes(tests, pos)
    for days in range(1, 9):
        part = known_changes(tests[:, :days], pos[:, :days])
        assert (part.change_day[0] == -1).all() or np.isnan(part.since).all()
        np.testing.assert_array_equal(part.change_day[0], full.change_day[0, :days])


def test_intervals_agree_with_statsmodels() -> None:
    # without a dispersion above 1 (a flat Poisson series), the tests' interval is the Poisson
    # GLM's; the odds ratio's is Woolf's as statsmodels computes it
    rng = np.random.default_rng(11)
    n, change = 120, 80
    neg = np.where(np.arange(n) < change, 2000.0, 5000.0)
    pos = rng.poisson(np.full(n, 60.0)).astype(float)
    tests = pos + rng.poisson(neg)
    k = known_changes(tests[None, :], pos[None, :], level=0.95)
    day = change + 6  # 7 days known: the whole compare window
    tau = int(k.change_day[0, day])
    assert tau == change
    a = tests[tau : tau + 7].sum()
    b = tests[tau - 7 : tau].sum() + tests[tau - 14 : tau - 7].sum()
    pa, pb = pos[tau : tau + 7].sum(), pos[tau - 14 : tau].sum()
    # dispersion estimated from the whole weeks before: about 1 for Poisson counts, floored at 1
    y = tests[tau - 14 : tau + 7]  # the 21 daily counts, an indicator of the 7 after
    x = np.column_stack([np.ones(21), np.r_[np.zeros(14), np.ones(7)]])
    fit = sm.GLM(y, x, family=sm.families.Poisson()).fit()
    ratio = float(np.exp(fit.params[1]))
    assert k.tests_ratio[0, day] == pytest.approx(ratio, rel=1e-9)
    se = float(fit.bse[1])
    width = np.log(k.tests_ratio_upper[0, day] / k.tests_ratio[0, day]) / 1.959963984540054
    assert width == pytest.approx(se, rel=0.35)  # sqrt(phi) of a Poisson series: near 1
    assert width >= se * (1 - 1e-9)  # the dispersion is floored at 1
    table = Table2x2(np.array([[pa, a - pa], [pb, b - pb]]) + 0.5)
    assert k.odds_ratio[0, day] == pytest.approx(table.oddsratio, rel=1e-9)
    lo, hi = table.oddsratio_confint(alpha=0.05, method="normal")
    assert k.odds_ratio_lower[0, day] == pytest.approx(lo, rel=1e-9)
    assert k.odds_ratio_upper[0, day] == pytest.approx(hi, rel=1e-9)


def test_a_dismissed_change_is_gone_from_its_day_on_and_not_flagged_again() -> None:
    tests, pos = _tests(4, 90)
    before = known_changes(tests, pos)
    tau = int(before.change_day[0, 100])
    k = known_changes(tests, pos, dismissed=[(0, tau, 100)])
    np.testing.assert_array_equal(k.change_day[0, :100], before.change_day[0, :100])
    assert np.all(k.change_day[0, 100:] == -1)


def test_bad_arguments_are_refused() -> None:
    tests, pos = _tests(6, None)
    with pytest.raises(ValueError, match="compare"):
        known_changes(tests, pos, compare=8)
    with pytest.raises(ValueError, match="min_days"):
        known_changes(tests, pos, min_days=0)
    with pytest.raises(ValueError, match="positives: shape"):
        known_changes(tests, pos[:, :10])
