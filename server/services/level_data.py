"""The regions a policy assigns tiers to, and their indicator inputs.

A policy applies to the districts (the default), the areas above them or the county (its
``level``, ``docs/rules.md``, "Policies above the districts"). :func:`policy_data` reads the
districts' measures as known at a cutoff (:func:`~server.services.district_data.
load_district_data`, so every as-of and vintaged read stays what it is) and, above the
districts, aggregates them up the hierarchy with the pure kernels of
:mod:`server.indicators.aggregate` (:func:`aggregate_data`): the result is a
:class:`~server.services.district_data.DistrictData` whose regions are the areas or the county,
so every indicator kind computes on it unchanged, from summed counts and populations.
:func:`evaluate_policy` runs the engine on it; the evaluation use case (and a loop over several
active policies) calls it with the ruleset at hand.

Partial coverage follows :data:`~server.indicators.aggregate.MAX_MISSING_SHARE`: a region's
figure is missing on a day when districts holding more than that share of its population lack
one, and its indicator is stale or invalid when districts holding more than that share are.
Nowcasts of late reports are made per district only: above the districts the indicators use
the reports as received.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from datetime import date, datetime, timedelta

import numpy as np
from numpy.typing import NDArray
from scipy import sparse
from sqlalchemy.orm import Session

from rules import Evaluation, FieldError, Ruleset, evaluate
from server.indicators.aggregate import MAX_MISSING_SHARE, membership, sum_counts, weighted_mean
from server.services.district_data import (
    DistrictData,
    MeasureNeeds,
    load_district_data,
    store_measures,
)
from server.services.district_indicators import district_indicators
from server.services.hierarchy import Hierarchy, hierarchy
from server.services.indicator_kinds import (
    known_measures,
    measure_needs,
    resolve,
)

__all__ = ["aggregate_data", "area_figures", "at_level", "evaluate_policy", "policy_data"]

#: The region level each policy level stores its assessments under (``overrides`` match it).
REGION_LEVEL = {"areas": "area", "county": "county"}


def _share_over(mask: NDArray[np.bool_], weights: NDArray[np.float64],
                limit: float) -> NDArray[np.bool_]:
    """(groups, days): True where members holding more than ``limit`` of the weight are
    flagged in ``mask`` (members, days)."""
    total = weights.sum(axis=1)[:, None]
    flagged = sparse.csr_array(weights) @ mask.astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, flagged / total, 0.0) > limit + 1e-9


def aggregate_data(
    data: DistrictData, *, groups: Sequence[str], parent_of: Mapping[str, str | None],
    region_level: str, max_missing: float = MAX_MISSING_SHARE, blocks: int = 1,
) -> DistrictData:
    """``data`` (districts) summed into ``groups`` (areas or the county) up ``parent_of``.

    District measures: counts and levels sum (:func:`~server.indicators.aggregate.sum_counts`,
    counts kept whole), concentrations are population-weighted means. Area measures (ICU beds):
    the area's own figures, summed over areas for a group above them. Plants: each group is
    served by the people its districts have served (catchment shares), so the wastewater kinds
    weight the plants by them. Stale and invalid: more than ``max_missing`` of the population.

    ``blocks``: ``data`` holds that many stacked copies of the districts, block by block, with
    codes ``k:code`` (the as-known backtest's windows, ``as_known_replay._stack``); each block is
    summed on its own and the result is stacked the same way (codes ``k:group``).
    """
    r = len(data.regions) // blocks
    districts = [c.split(":", 1)[1] if blocks > 1 else c for c in data.regions[:r]]
    m = membership(districts, parent_of, groups)
    pop = data.population[:r]
    weights = m * pop[None, :]
    kinds = data.measure_kinds

    def unfold(a: NDArray) -> NDArray:  # type: ignore[type-arg]
        """(blocks * rows, days) -> (rows, blocks * days)"""
        return a.reshape(blocks, a.shape[0] // blocks, -1).transpose(1, 0, 2).reshape(
            a.shape[0] // blocks, -1)

    def fold(a: NDArray) -> NDArray:  # type: ignore[type-arg]
        """(rows, blocks * days) -> (blocks * rows, days)"""
        return a.reshape(a.shape[0], blocks, -1).transpose(1, 0, 2).reshape(
            blocks * a.shape[0], -1)

    def combine(values: NDArray[np.float64], measure: str) -> NDArray[np.float64]:
        kind = kinds.get(measure, kinds.get(measure.split(".", 1)[0], "count"))
        if kind == "concentration":
            return fold(weighted_mean(unfold(values), weights, max_missing=max_missing).values)
        return fold(sum_counts(unfold(values), m, population=pop, max_missing=max_missing,
                               whole=kind == "count").values)

    # The area measures come copied to each district of an area: take one row per area.
    area_of = [parent_of.get(d) for d in districts]
    area_codes = sorted({a for a in area_of if a is not None})
    first = [area_of.index(a) for a in area_codes]
    area_pop = np.array([pop[[i for i, a in enumerate(area_of) if a == c]].sum()
                         for c in area_codes])
    am = membership(area_codes, parent_of, groups) if area_codes else np.zeros((len(groups), 0))
    if list(groups) == area_codes:  # the areas themselves: their own figures
        am = np.eye(len(area_codes))

    def area_values(values: NDArray[np.float64]) -> NDArray[np.float64]:
        if not area_codes:
            return np.full((blocks * len(groups), data.dates.size), np.nan)
        return fold(sum_counts(unfold(values)[first], am, population=area_pop,
                               max_missing=max_missing).values)

    def flags(masks: Mapping[str, NDArray[np.bool_]]) -> dict[str, NDArray[np.bool_]]:
        return {k: fold(_share_over(unfold(v), weights, max_missing)) for k, v in masks.items()}

    plants = data.plant_population.size // blocks
    served = np.kron(np.eye(blocks), m @ data.served[:r, :plants])
    codes = tuple(f"{k}:{g}" for k in range(blocks) for g in groups) if blocks > 1 else tuple(
        groups)
    return DistrictData(
        regions=codes, levels=(region_level,) * len(codes), population=np.tile(m @ pop, blocks),
        dates=data.dates,
        district={k: combine(v, k) for k, v in data.district.items()},
        area_of_district={k: area_values(v) for k, v in data.area_of_district.items()},
        plant=data.plant, plant_population=data.plant_population, served=served,
        as_of=data.as_of, stale=flags(data.stale), invalid=flags(data.invalid),
        bad_values=data.bad_values, measure_kinds=data.measure_kinds,
        plant_invalid=data.plant_invalid, plant_stale=data.plant_stale, nowcasts={},
    )


def at_level(data: DistrictData, ruleset: Ruleset, parent_of: Mapping[str, str | None] | None,
             *, blocks: int = 1) -> DistrictData:
    """``data`` (districts; ``blocks`` stacked copies as in :func:`aggregate_data`) summed to
    the regions of ``ruleset``'s level (unchanged for a district-level policy)."""
    if ruleset.level == "districts" or parent_of is None:
        return data
    r = len(data.regions) // blocks
    districts = [c.split(":", 1)[1] if blocks > 1 else c for c in data.regions[:r]]
    tree = Hierarchy(parent_of=parent_of, names={})
    return aggregate_data(data, groups=tree.regions(ruleset.level, districts),
                          parent_of=parent_of, region_level=REGION_LEVEL[ruleset.level],
                          blocks=blocks)


def policy_data(
    *, session: Session, ruleset: Ruleset, start: date, end: date, as_of: datetime | None,
    stale_after: Mapping[str, timedelta] | None = None, needs: MeasureNeeds | None = None,
) -> DistrictData:
    """The inputs of ``ruleset``'s indicators for the regions of its level, as known at
    ``as_of`` (districts: :func:`load_district_data` itself); ``needs`` defaults to the
    measures its indicators read."""
    needs = needs or measure_needs(ruleset, store_measures(session=session))
    if ruleset.level == "districts":
        return load_district_data(session=session, start=start, end=end, as_of=as_of,
                                  stale_after=stale_after, needs=needs)
    data = load_district_data(session=session, start=start, end=end, as_of=as_of,
                              stale_after=stale_after, needs=needs, nowcast=False)
    return at_level(data, ruleset, hierarchy(session=session).parent_of)


def evaluate_policy(
    *, session: Session, ruleset: Ruleset, start: date, end: date, as_of: datetime | None,
    stale_after: Mapping[str, timedelta] | None = None, needs: MeasureNeeds | None = None,
) -> Evaluation:
    """The engine's evaluation of ``ruleset`` over ``start..end`` for the regions of its level
    (data as known at ``as_of``); nothing is stored."""
    data = policy_data(session=session, ruleset=ruleset, start=start, end=end, as_of=as_of,
                       stale_after=stale_after, needs=needs)
    return evaluate(ruleset, district_indicators(data, ruleset), regions=data.regions,
                    dates=data.dates, region_levels=data.levels)


def area_figures(ruleset: Ruleset, measures: Mapping[str, str]) -> frozenset[str]:
    """The indicators of a district-level ``ruleset`` whose measures are stored per area (ICU
    beds): each district is given its area's figure, which the district page says. Empty for
    a policy above the districts (there every figure is the region's own). ``measures``: the
    store's catalogue (name -> kind)."""
    if ruleset.level != "districts":
        return frozenset()
    known = known_measures(measures)
    out = set()
    for name in ruleset.used_indicators():
        try:
            ind = resolve(ruleset.indicator(name), known, ruleset)
        except FieldError:
            continue
        if ind is not None and ind.kind.level == "area":
            out.add(name)
    return frozenset(out)
