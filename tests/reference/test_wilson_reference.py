"""Wilson score intervals against Newcombe (1998) Table I and statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from statsmodels.stats.proportion import proportion_confint

from server.indicators.wilson import wilson_interval


@pytest.mark.parametrize(
    ("successes", "trials", "lower", "upper"),
    [
        # Newcombe, R. G. (1998). Stat Med 17:857-872, Table I, method 3 (Wilson score).
        (81, 263, 0.2553, 0.3662),
        (15, 148, 0.0624, 0.1605),
        (0, 20, 0.0, 0.1611),
        (1, 29, 0.0061, 0.1718),
    ],
    ids=["81of263", "15of148", "0of20", "1of29"],
)
def test_wilson_interval_matches_newcombe_table(
    successes: int, trials: int, lower: float, upper: float
) -> None:
    result = wilson_interval([float(successes)], [float(trials)])
    assert_allclose(np.round(result.lower[0], 4), lower)
    assert_allclose(np.round(result.upper[0], 4), upper)


@pytest.mark.parametrize("level", [0.9, 0.95, 0.99], ids=["90", "95", "99"])
def test_wilson_interval_matches_statsmodels_on_random_inputs(level: float) -> None:
    rng = np.random.default_rng(30)
    trials = rng.integers(1, 2000, size=300).astype(float)
    successes = rng.binomial(trials.astype(int), rng.uniform(0, 1, size=300)).astype(float)
    result = wilson_interval(successes, trials, level=level)
    # Reference: statsmodels.stats.proportion.proportion_confint(method="wilson").
    low, upp = proportion_confint(successes, trials, alpha=1 - level, method="wilson")
    assert_allclose(result.lower, low, rtol=1e-9, atol=1e-12)
    assert_allclose(result.upper, upp, rtol=1e-9, atol=1e-12)
