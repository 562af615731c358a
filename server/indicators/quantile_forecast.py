"""What a probabilistic forecast is, between the code that makes one and the code that scores it.

A :class:`QuantileForecast` holds, for one target measure (``"hosp_admissions"``,
``"icu_occupied"``, ``"icu_share"``, ...) and one named scenario, the predictive quantiles of the
value on each of the ``horizons`` days after ``origin`` (the last day with data at the cutoff) for
every region at once. Quantile levels are symmetric around the median and include 0.5, so that
central intervals (``1 - 2 * level`` wide) and the weighted interval score (Bracher et al. 2021,
PLoS Comput Biol 17:e1008618, eq. 2) can be read off directly.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, timedelta

import numpy as np
from numpy.typing import NDArray

# 5-95 %, 25-75 % and the median: the 90 % and 50 % central intervals.
DEFAULT_LEVELS = (0.05, 0.25, 0.5, 0.75, 0.95)


@dataclass(frozen=True, kw_only=True)
class QuantileForecast:
    """Predictive quantiles shaped (regions, horizons, levels)."""

    target: str
    scenario: str
    regions: tuple[str, ...]
    origin: date
    horizons: NDArray[np.int64]
    levels: NDArray[np.float64]
    values: NDArray[np.float64]

    def __post_init__(self) -> None:
        levels = np.asarray(self.levels, dtype=np.float64)
        if levels.ndim != 1 or not np.all(np.diff(levels) > 0) or not np.any(levels == 0.5):
            raise ValueError("quantile levels must increase and include the median (0.5)")
        if not np.allclose(levels, 1.0 - levels[::-1]):
            raise ValueError("quantile levels must be symmetric around the median")
        expected = (len(self.regions), len(self.horizons), levels.size)
        if np.shape(self.values) != expected:
            raise ValueError(f"values shaped {np.shape(self.values)}, expected {expected}")

    def target_dates(self) -> tuple[date, ...]:
        """The day each horizon forecasts."""
        return tuple(self.origin + timedelta(days=int(h)) for h in self.horizons)

    def median(self) -> NDArray[np.float64]:
        """(regions, horizons) medians."""
        return self.values[:, :, int(np.flatnonzero(self.levels == 0.5)[0])]

    def interval(self, coverage: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Lower and upper bounds, (regions, horizons), of the central ``coverage`` interval."""
        alpha = (1.0 - coverage) / 2.0
        lo = np.flatnonzero(np.isclose(self.levels, alpha))
        hi = np.flatnonzero(np.isclose(self.levels, 1.0 - alpha))
        if lo.size == 0 or hi.size == 0:
            raise ValueError(f"no {coverage:.0%} central interval in levels {self.levels}")
        return self.values[:, :, lo[0]], self.values[:, :, hi[0]]
