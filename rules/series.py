"""The evaluator's input contract: one :class:`IndicatorSeries` per indicator, for all regions.

Arrays are shaped ``(regions, days)``; NaN marks a missing value, never 0. Only ``estimate`` is
required. ``lower``/``upper`` are needed by criteria using ``statistic: bounds`` and by signals
reading a bound; ``count`` by criteria with ``min_count``. ``stale`` flags values known to be out of
date; ``age_days`` (days since the data were last refreshed) marks values older than the
indicator's ``max_age_days`` as stale and lets explanations say how old they are. ``nowcast``
flags values that are nowcasts of recent days; ``nowcast_days`` (how many days of the value's
window are still incomplete) and ``nowcast_basis`` (per region, whose reports the delays rest on)
let explanations say so. ``invalid`` flags values that rest on input the caller found unusable (a
stored count that is not a whole number, say): unknown, explained as ``invalid``. ``no_baseline``
flags values missing because the indicator's baseline does not exist yet (fewer past seasons
than a seasonal intensity needs): unknown, explained as ``no baseline``. ``size`` is the size of
a dated change an indicator counts days from (a ``testing_change``: tests after / before), for
the explanation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from rules.errors import EvaluationInputError

__all__ = ["IndicatorSeries"]

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]


@dataclass(frozen=True, kw_only=True, eq=False)
class IndicatorSeries:
    """One indicator for all regions and days.

    Parameters
    ----------
    estimate : array, (regions, days)
        Point estimate; NaN = missing.
    lower, upper : array, (regions, days), optional
        Interval bounds.
    count : array, (regions, days), optional
        Underlying event count, for ``min_count`` rules.
    stale : bool array, (regions, days), optional
        True where the value is known to be stale.
    age_days : array, (regions, days), optional
        Age of the data in days.
    nowcast : bool array, (regions, days), optional
        True where the value is a nowcast.
    nowcast_days : array, (regions, days), optional
        Days of the value's window still incomplete (nowcast).
    nowcast_basis : tuple of str, (regions,), optional
        Per region, what the reporting delays rest on ("pooled over North").
    invalid : bool array, (regions, days), optional
        True where the value rests on unusable input data (unknown to the engine).
    no_baseline : bool array, (regions, days), optional
        True where no value exists because its baseline is too short (unknown to the engine).
    size : array, (regions, days), optional
        Size of the dated change the value counts days from (tests after / before).
    """

    estimate: FloatArray
    lower: FloatArray | None = None
    upper: FloatArray | None = None
    count: FloatArray | None = None
    stale: BoolArray | None = None
    age_days: FloatArray | None = None
    nowcast: BoolArray | None = None
    nowcast_days: FloatArray | None = None
    nowcast_basis: tuple[str, ...] | None = None
    invalid: BoolArray | None = None
    no_baseline: BoolArray | None = None
    size: FloatArray | None = None

    def __post_init__(self) -> None:
        est = _float2d("estimate", self.estimate)
        object.__setattr__(self, "estimate", est)
        for name in ("lower", "upper", "count", "age_days", "nowcast_days", "size"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, _float2d(name, value, est.shape))
        for name in ("stale", "nowcast", "invalid", "no_baseline"):
            value = getattr(self, name)
            if value is not None:
                arr = np.asarray(value)
                if arr.dtype != np.bool_:
                    raise EvaluationInputError(name, f"expected booleans, got dtype {arr.dtype}")
                object.__setattr__(self, name, _shape(name, arr, est.shape))
        if self.nowcast_basis is not None:
            basis = tuple(str(b) for b in self.nowcast_basis)
            if len(basis) != est.shape[0]:
                raise EvaluationInputError(
                    "nowcast_basis", f"{len(basis)} entries for {est.shape[0]} regions"
                )
            object.__setattr__(self, "nowcast_basis", basis)

    @property
    def shape(self) -> tuple[int, int]:
        return (int(self.estimate.shape[0]), int(self.estimate.shape[1]))


def _float2d(name: str, value: ArrayLike, shape: tuple[int, ...] | None = None) -> FloatArray:
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim != 2:
        raise EvaluationInputError(name, f"expected shape (regions, days), got {arr.ndim} dims")
    if np.isinf(arr).any():
        raise EvaluationInputError(name, "contains infinite values")
    return _shape(name, arr, shape) if shape is not None else arr


def _shape(name: str, arr: NDArray[np.generic], shape: tuple[int, ...]) -> NDArray:  # type: ignore[type-arg]
    if arr.shape != shape:
        raise EvaluationInputError(name, f"shape {arr.shape} differs from estimate's {shape}")
    return arr
