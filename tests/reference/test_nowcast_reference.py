"""Chain-ladder nowcast against a hand-computed triangle and a simulated delayed series."""

from __future__ import annotations

import numpy as np
from numpy.testing import assert_allclose

from server.indicators.nowcast import nowcast

NAN = np.nan

# Cumulative 4x4 triangle (rows = reference days, columns = delay 0..3), invented numbers.
#   day 0: 10 15 18 20
#   day 1: 12 18 21  .
#   day 2:  8 13  .  .
#   day 3: 11  .  .  .
# Chain-ladder development factors (Mack 1993, ASTIN Bull 23:213, eq. for f_k), by hand:
#   f0 = (15 + 18 + 13) / (10 + 12 + 8) = 46/30
#   f1 = (18 + 21) / (15 + 18)           = 39/33
#   f2 = 20 / 18                         = 10/9
# Ultimates: day 1 = 21 * 10/9 = 23.333..; day 2 = 13 * 39/33 * 10/9 = 17.0707..;
#            day 3 = 11 * 46/30 * 39/33 * 10/9 = 22.1481..
TRIANGLE = np.array(
    [[[10.0, 15, 18, 20], [12, 18, 21, NAN], [8, 13, NAN, NAN], [11, NAN, NAN, NAN]]]
)


def test_chain_ladder_factors_match_hand_computation() -> None:
    res = nowcast(TRIANGLE)
    assert_allclose(res.delays.factors[0], [46 / 30, 39 / 33, 10 / 9], rtol=1e-12)


def test_chain_ladder_ultimates_match_hand_computation() -> None:
    res = nowcast(TRIANGLE)
    expected = [20.0, 21 * 10 / 9, 13 * 39 / 33 * 10 / 9, 11 * 46 / 30 * 39 / 33 * 10 / 9]
    assert_allclose(res.estimate[0], expected, rtol=1e-12)


def test_chain_ladder_reported_shares_are_inverse_cumulative_factors() -> None:
    # share known by delay d = 1 / prod_{k>=d} f_k (Mack 1993, development pattern)
    res = nowcast(TRIANGLE)
    f0, f1, f2 = 46 / 30, 39 / 33, 10 / 9
    expected = [1 / (f0 * f1 * f2), 1 / (f1 * f2), 1 / f2, 1.0]
    assert_allclose(res.delays.reported[0], expected, rtol=1e-12)


def test_simulated_delayed_series_is_covered_at_the_nominal_rate() -> None:
    # simulation with a known delay pmf; 95 % intervals should cover about 95 % of final counts
    # (nominal-coverage check, common practice, no source)
    rng = np.random.default_rng(2024)
    regions, days, pmf = 400, 60, np.array([0.3, 0.25, 0.2, 0.12, 0.08, 0.05])
    lam = rng.uniform(20.0, 200.0, (regions, 1)) * np.exp(0.02 * np.arange(days))
    final = rng.poisson(lam)
    cumulative = np.cumsum(rng.multinomial(final, pmf).astype(float), axis=2)
    delay = np.arange(pmf.size)[np.newaxis, :]
    unseen = np.arange(days)[:, np.newaxis] + delay > days - 1
    cumulative[:, unseen] = NAN
    res = nowcast(cumulative, window=40, level=0.95)
    recent = slice(days - 5, days)
    truth = final[:, recent]
    covered = (truth >= res.lower[:, recent]) & (truth <= res.upper[:, recent])
    assert 0.93 <= covered.mean() <= 0.985
    # and the nowcast is unbiased where the naive last-known value reads as a fall
    assert_allclose(res.estimate[:, recent].sum() / final[:, recent].sum(), 1.0, atol=0.02)
    assert res.known[:, -1].sum() < 0.5 * final[:, -1].sum()
