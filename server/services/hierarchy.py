"""Aggregating district arrays up the region hierarchy (the services' side).

The arithmetic is :mod:`server.indicators.aggregate` (pure, vectorised); this module keeps the
names its callers use (capacity forecasts, measures and their effects): :func:`membership` and
:func:`sum_up`, the strict sum (a parent is known on a day only when every one of its children
is), :func:`hierarchy` (the region tree read from the store) and :func:`fill_parents` (the
rows of regions that report nothing themselves, summed from the regions below them: the
forecast record's area admissions). Rates are never averaged but recomputed by the caller
from aggregated numerators and denominators; the evaluation of a policy at area or county
level aggregates whole :class:`~server.services.district_data.DistrictData` in
:mod:`server.services.level_data`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from server.indicators.aggregate import membership, sum_counts
from server.store.models import Region

__all__ = [
    "Aggregated", "Hierarchy", "fill_parents", "hierarchy", "membership", "parents_of", "sum_up",
]


def parents_of(regions: Mapping[int, Region]) -> dict[str, str | None]:
    """Each region's code to its parent's code (None at the top), from regions by id."""
    return {r.code: regions[r.parent_id].code if r.parent_id in regions else None
            for r in regions.values()}


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


@dataclass(frozen=True, kw_only=True)
class Hierarchy:
    """The region tree above the districts: each region's parent, and the regions of a level."""

    parent_of: Mapping[str, str | None]
    names: Mapping[str, str]

    def areas(self, districts: Sequence[str]) -> tuple[str, ...]:
        """The parents of ``districts`` (those that have one), in code order."""
        return tuple(sorted({p for d in districts if (p := self.parent_of.get(d)) is not None}))

    def county(self, districts: Sequence[str]) -> tuple[str, ...]:
        """The top of the tree above ``districts`` (a district without a parent has none)."""
        tops = set()
        for d in districts:
            node, seen = self.parent_of.get(d), set()
            while node is not None and node not in seen:
                seen.add(node)
                top, node = node, self.parent_of.get(node)
            if seen:
                tops.add(top)
        return tuple(sorted(tops))

    def regions(self, level: str, districts: Sequence[str]) -> tuple[str, ...]:
        if level == "areas":
            return self.areas(districts)
        if level == "county":
            return self.county(districts)
        raise ValueError(f"no regions above the districts for level {level!r}")


def hierarchy(*, session: Session) -> Hierarchy:
    """Every region's parent code and name (one read)."""
    parent = aliased(Region)
    rows = session.execute(
        select(Region.code, Region.name, parent.code).outerjoin(parent,
                                                                 parent.id == Region.parent_id)
    ).all()
    return Hierarchy(parent_of={c: p for c, _n, p in rows}, names={c: n for c, n, _p in rows})


def fill_parents(
    values: NDArray[np.float64], regions: Sequence[str], parent_of: Mapping[str, str | None]
) -> NDArray[np.float64]:
    """``values`` (regions, days) with the row of each region that has no value at all and has
    reporting regions below it replaced by their strict sum (:func:`sum_up`: missing on a day
    when any of them is). Regions that report keep their own rows."""
    reports = np.isfinite(values).any(axis=1)
    members = [r for r, has in zip(regions, reports, strict=True) if has]
    empty = [r for r, has in zip(regions, reports, strict=True) if not has]
    if not members or not empty:
        return values
    matrix = membership(members, parent_of, empty)
    below = matrix.sum(axis=1) > 0
    if not below.any():
        return values
    summed = sum_counts(values[reports], matrix).values
    out = values.copy()
    rows = np.flatnonzero(~reports)
    out[rows[below]] = summed[below]
    return out
