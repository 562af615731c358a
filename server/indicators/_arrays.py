"""Shared input validation for the indicator functions.

Every indicator takes arrays shaped ``(regions, days)``. These helpers turn array-likes into float
arrays of that shape, check windows and levels, and raise :class:`ValueError` naming the argument.
Validation lives here, computation in the indicator modules (the scipy.stats split).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import fields

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

CHUNK_ELEMENTS = 65_536  # elementwise work in pieces of this size stays in the CPU caches


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


def check_positive(name: str, value: float) -> float:
    """Check a positive, finite number."""
    if not np.isfinite(value) or value <= 0:
        raise ValueError(f"{name}: must be positive and finite, got {value!r}")
    return float(value)


def check_level(name: str, level: float) -> float:
    """Check a confidence level strictly between 0 and 1."""
    if not 0.0 < float(level) < 1.0:
        raise ValueError(f"{name}: confidence level must be between 0 and 1, got {level!r}")
    return float(level)


def freeze_arrays(result: object) -> None:
    """Make every numpy array field of a dataclass instance read-only."""
    for field in fields(result):  # type: ignore[arg-type]
        value = getattr(result, field.name)
        if isinstance(value, np.ndarray):
            value.setflags(write=False)


def check_max_missing(max_missing: int, window: int) -> int:
    """Check ``0 <= max_missing < window``."""
    if (
        isinstance(max_missing, bool)
        or not isinstance(max_missing, (int, np.integer))
        or not 0 <= max_missing < window
    ):
        raise ValueError(
            f"max_missing: must be an integer in [0, {window - 1}] for window {window}, "
            f"got {max_missing!r}"
        )
    return int(max_missing)


def trailing_sum(filled: FloatArray, window: int) -> FloatArray:
    """Sum over days t - window + 1 .. t of a NaN-free array (one cumulative sum along axis 1)."""
    total = np.cumsum(filled, axis=1)
    if window < filled.shape[1]:
        total[:, window:] -= total[:, :-window].copy()
    return total


def trailing_totals(values: FloatArray, window: int) -> tuple[FloatArray, IntArray]:
    """Trailing-window sum of observed values and count of observed days.

    Uses cumulative sums along axis 1, so the cost is O(regions * days) for any window; integer
    counts stay exact (float64 holds integers exactly up to 2**53). Days before the start of the
    series count as missing.
    """
    observed = ~np.isnan(values)
    filled = np.where(observed, values, 0.0)
    total = np.cumsum(filled, axis=1)
    count = np.cumsum(observed, axis=1, dtype=np.int64)
    if window < values.shape[1]:
        total[:, window:] -= total[:, :-window].copy()
        count[:, window:] -= count[:, :-window].copy()
    return total, count


def windowed_total(
    values: FloatArray, window: int, max_missing: int
) -> tuple[FloatArray, FloatArray, IntArray]:
    """Observed total, scale factor ``w / n_obs`` and observed days, NaN where refused."""
    total, count = trailing_totals(values, window)
    refused = count < window - max_missing
    with np.errstate(divide="ignore", invalid="ignore"):
        factor = np.where(refused, np.nan, window / np.maximum(count, 1))
    total = np.where(refused, np.nan, total)
    return total, factor, count


def flat_chunks(size: int, chunk: int = CHUNK_ELEMENTS) -> Iterator[slice]:
    """Slices covering ``range(size)`` in pieces of ``chunk``.

    Elementwise work on large arrays runs several times faster piece by piece: the temporaries
    of a piece stay in cache and are reused by the allocator instead of being mapped afresh.
    """
    for first in range(0, size, chunk):
        yield slice(first, min(first + chunk, size))


def row_chunks(rows: int, per_row: int, chunk: int = CHUNK_ELEMENTS) -> Iterator[slice]:
    """Slices of rows holding about ``chunk`` elements each (at least one row)."""
    step = max(1, chunk // max(per_row, 1))
    for first in range(0, rows, step):
        yield slice(first, min(first + step, rows))
