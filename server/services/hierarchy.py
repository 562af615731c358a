"""Aggregating district arrays up the region hierarchy.

Counts aggregate upward by sum (a parent is known on a day only when every one of its children is);
levels such as ICU beds in use also sum; rates are never averaged but recomputed by the caller from
aggregated numerators and denominators. Vectorised: one matrix product per measure.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray


@dataclass(frozen=True, kw_only=True)
class Aggregated:
    """Arrays (parents, days) summed from children, with how many children reported each day."""

    parents: tuple[str, ...]
    values: NDArray[np.float64]
    reporting: NDArray[np.int64]
    children: NDArray[np.int64]


def membership(
    children: Sequence[str], parent_of: Mapping[str, str | None], parents: Sequence[str]
) -> NDArray[np.float64]:
    """Matrix (parents, children) with 1 where a child belongs to a parent (directly or deeper)."""
    index = {p: i for i, p in enumerate(parents)}
    matrix = np.zeros((len(parents), len(children)))
    for j, child in enumerate(children):
        node = parent_of.get(child)
        seen = set()
        while node is not None and node not in seen:
            seen.add(node)
            if node in index:
                matrix[index[node], j] = 1.0
            node = parent_of.get(node)
    return matrix


def sum_up(
    values: NDArray[np.float64], matrix: NDArray[np.float64], parents: Sequence[str]
) -> Aggregated:
    """Sum children's values into parents; NaN on a day when any child of the parent is missing."""
    present = np.isfinite(values)
    totals = matrix @ np.where(present, values, 0.0)
    reporting = (matrix @ present.astype(np.float64)).astype(np.int64)
    children = matrix.sum(axis=1).astype(np.int64)
    complete = reporting == children[:, None]
    return Aggregated(
        parents=tuple(parents),
        values=np.where(complete & (children[:, None] > 0), totals, np.nan),
        reporting=reporting,
        children=children,
    )
