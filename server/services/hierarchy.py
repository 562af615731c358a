"""Aggregating district arrays up the region hierarchy (the services' side).

The arithmetic is :mod:`server.indicators.aggregate` (pure, vectorised); this module keeps the
names its callers use (capacity forecasts, measures and their effects): :func:`membership` and
:func:`sum_up`, the strict sum (a parent is known on a day only when every one of its children
is). Rates are never averaged but recomputed by the caller from aggregated numerators and
denominators; the evaluation of a policy at area or county level aggregates whole
:class:`~server.services.district_data.DistrictData` in :mod:`server.services.level_data`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from server.indicators.aggregate import membership, sum_counts

__all__ = ["Aggregated", "membership", "sum_up"]


@dataclass(frozen=True, kw_only=True)
class Aggregated:
    """Arrays (parents, days) summed from children, with how many children reported each day."""

    parents: tuple[str, ...]
    values: NDArray[np.float64]
    reporting: NDArray[np.int64]
    children: NDArray[np.int64]


def sum_up(
    values: NDArray[np.float64], matrix: NDArray[np.float64], parents: Sequence[str]
) -> Aggregated:
    """Sum children's values into parents; NaN on a day when any child of the parent is missing."""
    agg = sum_counts(values, matrix)
    return Aggregated(parents=tuple(parents), values=agg.values, reporting=agg.reporting,
                      children=agg.members)
