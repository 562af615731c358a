"""Shared input validation for the indicator functions.

Every indicator takes arrays shaped ``(regions, days)``. These helpers turn array-likes into float
arrays of that shape, check windows and levels, and raise :class:`ValueError` naming the argument.
Validation lives here, computation in the indicator modules (the scipy.stats split).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]


def as_regions_days(name: str, values: ArrayLike) -> FloatArray:
    """Return ``values`` as a float64 array shaped (regions, days).

    A 1-D input is one region and becomes shape ``(1, days)``. NaN marks a missing day; infinities
    are refused.
    """
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[np.newaxis, :]
    if arr.ndim != 2:
        raise ValueError(
            f"{name}: expected an array shaped (regions, days), got {arr.ndim} dimensions"
        )
    if np.isinf(arr).any():
        raise ValueError(f"{name}: contains infinite values")
    return arr


def as_nonnegative_counts(name: str, values: ArrayLike) -> FloatArray:
    """Like :func:`as_regions_days` and also refuse negative counts (NaN is allowed)."""
    arr = as_regions_days(name, values)
    with np.errstate(invalid="ignore"):
        negative = arr < 0
    if negative.any():
        first = tuple(int(i) for i in np.argwhere(negative)[0])
        raise ValueError(f"{name}: negative count {arr[first]} at index {first}")
    return arr


def as_population(name: str, population: ArrayLike, regions: int) -> FloatArray:
    """Return a population vector shaped (regions, 1) for broadcasting against (regions, days)."""
    pop = np.asarray(population, dtype=np.float64).reshape(-1)
    if pop.size == 1 and regions != 1:
        pop = np.full(regions, pop.item())
    if pop.size != regions:
        raise ValueError(f"{name}: {pop.size} values for {regions} regions")
    if not np.all(np.isfinite(pop)) or np.any(pop <= 0):
        raise ValueError(f"{name}: populations must be positive and finite, got {pop}")
    return pop[:, np.newaxis]


def check_window(name: str, window: int, *, minimum: int = 1) -> int:
    """Check that a window length is an integer of at least ``minimum`` days."""
    if isinstance(window, bool) or not isinstance(window, (int, np.integer)) or window < minimum:
        raise ValueError(f"{name}: window must be an integer >= {minimum}, got {window!r}")
    return int(window)


def check_level(name: str, level: float) -> float:
    """Check a confidence level strictly between 0 and 1."""
    if not 0.0 < float(level) < 1.0:
        raise ValueError(f"{name}: confidence level must be between 0 and 1, got {level!r}")
    return float(level)
