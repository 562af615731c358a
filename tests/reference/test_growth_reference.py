"""Growth-rate regression against statsmodels GLM fits of the same data."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

from server.indicators.growth import growth_rate


def _calendar_design(start: str, days: int) -> np.ndarray:
    """Intercept, day index and calendar-weekday dummies (Monday the reference)."""
    dates = pd.date_range(start, periods=days, freq="D")
    dummies = pd.get_dummies(dates.day_of_week, drop_first=True).to_numpy(dtype=float)
    return np.column_stack([np.ones(days), np.arange(days, dtype=float), dummies])


@pytest.mark.parametrize(
    ("scale", "dispersion"), [("X2", "quasipoisson"), (None, "poisson")], ids=["quasi", "poisson"]
)
def test_growth_rate_matches_statsmodels_glm_with_calendar_weekdays(
    scale: str | None, dispersion: str
) -> None:
    rng = np.random.default_rng(40)
    regions, days = 25, 14
    r_true = rng.uniform(-0.08, 0.08, size=(regions, 1))
    mean = rng.uniform(5, 400, size=(regions, 1)) * np.exp(r_true * np.arange(days))
    y = rng.negative_binomial(4, 4 / (4 + mean)).astype(float)
    y = np.maximum(y, 1.0)  # every weekday has a case, so every fit exists
    result = growth_rate(y, dispersion=dispersion, clamp_dispersion=False)  # type: ignore[arg-type]
    x = _calendar_design("2022-05-11", days)  # a Wednesday: weekdays differ from window days
    for i in range(regions):
        # Reference: statsmodels GLM, Poisson family, scale="X2" for quasi-Poisson
        # (McCullagh & Nelder 1989, section 4.5).
        fit = sm.GLM(y[i], x, family=sm.families.Poisson()).fit(scale=scale, tol=1e-12)
        assert_allclose(result.estimate[i], fit.params[1], rtol=1e-7, atol=1e-10)
        assert_allclose(result.std_error[i], fit.bse[1], rtol=1e-6)
        low, upp = fit.conf_int(alpha=0.05)[1]
        assert_allclose([result.lower[i], result.upper[i]], [low, upp], rtol=1e-6, atol=1e-9)
        if scale == "X2":
            assert_allclose(result.pearson_dispersion[i], fit.scale, rtol=1e-6)


@pytest.mark.parametrize(
    ("window", "day_of_week"), [(21, True), (10, False)], ids=["w21", "w10-no-dow"]
)
def test_rolling_growth_rate_with_missing_days_matches_statsmodels(
    window: int, day_of_week: bool
) -> None:
    # Reference: statsmodels GLM (Poisson, scale="X2") on the observed days of each window
    from server.indicators.growth import design_matrix, rolling_growth_rate

    rng = np.random.default_rng(41)
    y = rng.poisson(40 * np.exp(0.02 * np.arange(40)), (2, 40)).astype(float)
    y[0, [15, 27]] = np.nan
    result = rolling_growth_rate(y, window, day_of_week=day_of_week, max_missing=2,
                                 clamp_dispersion=False)
    x = design_matrix(window, day_of_week=day_of_week)
    for region in range(2):
        for end in (window - 1, 27, 39):
            seg = y[region, end - window + 1 : end + 1]
            keep = np.isfinite(seg)
            glm = sm.GLM(seg[keep], x[keep], family=sm.families.Poisson())
            fit = glm.fit(scale="X2", tol=1e-12)
            assert_allclose(result.estimate[region, end], fit.params[1], rtol=1e-7, atol=1e-12)
            assert_allclose(result.std_error[region, end], fit.bse[1], rtol=1e-6)
