"""Aggregation of (regions, days) arrays up the region hierarchy.

Pure and vectorised: a *membership matrix* ``(groups, members)`` says which member regions
(districts, or treatment plants) make up each group (an area, the county); every aggregate is
one sparse matrix product per measure (each member lies under few groups).

- **Counts** (cases, tests, admissions, beds in use, staffed beds, GP consultations and their
  denominators) sum: :func:`sum_counts`. Rates are never averaged: an indicator of a group is
  computed from its summed numerator and denominator (incidence from summed cases and summed
  population, positivity from summed positives over summed tests).
- **Values that cannot be summed** (wastewater concentrations, normalised loads) are combined by
  :func:`weighted_mean`, weighted by the people each member serves in the group (catchment
  shares times population).

Missing days stay missing. Partial coverage (some members without a value on a day) is handled
by one rule, ``max_missing``: a group's figure is missing on a day when members holding more
than ``max_missing`` of the group's weight (population) lack a value. When fewer are missing, a
sum is the *ratio estimate* ``S_reporting * W_all / W_reporting`` (the missing members assumed
at the reporting members' rate per person; Cochran 1977, "Sampling Techniques", ch. 6, the
ratio estimator of a total with population as the auxiliary variable; cited from memory),
rounded to a whole number for counts; a weighted mean is taken over the members with a
value. ``max_missing=0`` (the default) is the strict rule: any missing member makes the group
missing, so a sum is never an estimate. The share the services use is :data:`MAX_MISSING_SHARE`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import sparse

from server.indicators._arrays import as_regions_days

__all__ = ["MAX_MISSING_SHARE", "Aggregate", "membership", "sum_counts", "weighted_mean"]

#: Largest share of a group's population whose members may lack a day's value before the
#: group's figure is missing too (common practice, no source: a twentieth of the people).
MAX_MISSING_SHARE = 0.05
_TOLERANCE = 1e-9  # shares compared with the limit after float sums


@dataclass(frozen=True, kw_only=True)
class Aggregate:
    """Group figures ``(groups, days)`` and how much of each group stood behind them.

    ``coverage`` is the share of the group's weight (population; 1 per member without weights)
    whose members had a value that day (NaN for a group without members); ``reporting`` how
    many members had one; ``members`` how many members each group has.
    """

    values: NDArray[np.float64]
    coverage: NDArray[np.float64]
    reporting: NDArray[np.int64]
    members: NDArray[np.int64]


def membership(
    members: Sequence[str], parent_of: Mapping[str, str | None], groups: Sequence[str]
) -> NDArray[np.float64]:
    """Matrix ``(groups, members)`` with 1 where a member lies under a group (its parent, or
    higher up: a district under its area and under the county). Cycles in ``parent_of`` end
    the walk."""
    index = {g: i for i, g in enumerate(groups)}
    matrix = np.zeros((len(groups), len(members)))
    for j, member in enumerate(members):
        node = parent_of.get(member)
        seen: set[str] = set()
        while node is not None and node not in seen:
            seen.add(node)
            if node in index:
                matrix[index[node], j] = 1.0
            node = parent_of.get(node)
    return matrix


def _check(matrix: ArrayLike, members: int, name: str = "matrix") -> NDArray[np.float64]:
    m = np.asarray(matrix, dtype=np.float64)
    if m.ndim != 2 or m.shape[1] != members:
        raise ValueError(f"{name}: expected shape (groups, {members}), got {m.shape}")
    if not np.all(np.isfinite(m)) or np.any(m < 0):
        raise ValueError(f"{name}: entries must be finite and non-negative")
    return m


def _check_share(max_missing: float) -> float:
    if isinstance(max_missing, bool) or not 0.0 <= float(max_missing) < 1.0:
        raise ValueError(f"max_missing: expected a share in [0, 1), got {max_missing!r}")
    return float(max_missing)


def sum_counts(
    values: ArrayLike, matrix: ArrayLike, *, population: ArrayLike | None = None,
    max_missing: float = 0.0, whole: bool = False,
) -> Aggregate:
    """Sum members' daily values into their groups.

    Parameters
    ----------
    values : array_like, shape (members, days)
        Counts or levels that add up (NaN: missing).
    matrix : array_like, shape (groups, members)
        Membership (:func:`membership`); 1 where a member belongs to a group.
    population : array_like, shape (members,), optional
        Weight of each member in the coverage rule (default: 1 each).
    max_missing : float
        Largest share of a group's weight that may be missing on a day (module docstring);
        below it the sum of the reporting members is scaled to the whole group.
    whole : bool
        Round the scaled sums to whole numbers (counts stay counts).

    Returns
    -------
    Aggregate
        NaN on days with more than ``max_missing`` of the weight missing, and for groups
        without members or without weight.
    """
    v = as_regions_days("values", values)
    m = _check(matrix, v.shape[0])
    share = _check_share(max_missing)
    w = np.ones(v.shape[0]) if population is None else np.asarray(population, dtype=np.float64)
    if w.shape != (v.shape[0],) or not np.all(np.isfinite(w)) or np.any(w < 0):
        raise ValueError(f"population: expected {v.shape[0]} finite non-negative numbers")
    present = np.isfinite(v)
    weighted = sparse.csr_array(m * w[None, :])
    total = np.asarray(weighted.sum(axis=1)).reshape(-1, 1)
    covered = weighted @ present.astype(np.float64)
    ms = sparse.csr_array(m)
    raw = ms @ np.where(present, v, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        coverage = np.where(total > 0, covered / total, np.nan)
        scaled = np.where(covered > 0, raw * total / covered, np.nan)
    if whole:
        scaled = np.rint(scaled)
    ok = (total > 0) & (covered > 0) & (coverage >= 1.0 - share - _TOLERANCE)
    exact = ok & (coverage >= 1.0 - _TOLERANCE)
    out = np.where(exact, raw, np.where(ok, scaled, np.nan))
    return Aggregate(
        values=out, coverage=coverage,
        reporting=np.rint(ms @ present.astype(np.float64)).astype(np.int64),
        members=np.rint(m.sum(axis=1)).astype(np.int64),
    )


def weighted_mean(
    values: ArrayLike, weights: ArrayLike, *, max_missing: float = 0.0
) -> Aggregate:
    """Weighted mean of members' values per group, over the members with a value that day.

    ``weights`` ``(groups, members)``: how much each member counts in each group (people of
    the group served by each treatment plant). :math:`v_{g,t} = \\sum_p w_{gp} v_{p,t} /
    \\sum_p w_{gp}` over the members with a value on day :math:`t`; missing when members
    holding more than ``max_missing`` of the group's weight lack one, or none has weight.
    """
    v = as_regions_days("values", values)
    w = _check(weights, v.shape[0], "weights")
    share = _check_share(max_missing)
    present = np.isfinite(v)
    ws = sparse.csr_array(w)
    num = ws @ np.where(present, v, 0.0)
    den = ws @ present.astype(np.float64)
    total = w.sum(axis=1)[:, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        coverage = np.where(total > 0, den / total, np.nan)
        mean = np.where(den > 0, num / den, np.nan)
    ok = (den > 0) & (coverage >= 1.0 - share - _TOLERANCE)
    return Aggregate(
        values=np.where(ok, mean, np.nan), coverage=coverage,
        reporting=np.rint(sparse.csr_array((w > 0).astype(np.float64))
                          @ present.astype(np.float64)).astype(np.int64),
        members=np.rint((w > 0).sum(axis=1)).astype(np.int64),
    )
