"""Per-criterion comparisons, precomputed for all regions and days before the day loop.

For criterion ``c`` with per-region thresholds ``enter_k`` and ``exit_k`` (tiers k = 1..K):

* ``enter_level[d, c, r]`` = highest k such that the enter statistic meets ``enter_j`` for every
  j <= k, and
* ``exit_level[d, c, r]``  = highest k such that the hold statistic meets ``exit_j`` for
  every j <= k.

The day loop then only needs ``level = max(enter_level, min(tier held, exit_level))``: a tier
already held is kept while the exit threshold is still met (the hysteresis band), and a higher
tier is reached only by meeting its enter threshold. Whether a day is *known* (not missing, not
stale, not an excluded nowcast) and whether the criterion is *inactive* (count below ``min_count``)
does not depend on the state either, so it is precomputed too. Arrays are laid out ``(days,
criteria, regions)`` so that each day's slice is contiguous.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from rules.errors import EvaluationInputError
from rules.model import Criterion, CriterionPatch, Thresholds
from rules.ruleset import Ruleset
from rules.series import IndicatorSeries

__all__ = [
    "REASON_INVALID",
    "REASON_MISSING",
    "REASON_NO_BASELINE",
    "REASON_NOWCAST",
    "REASON_OK",
    "REASON_SMALL_COUNT",
    "REASON_STALE",
    "CriterionLevels",
    "RegionThresholds",
    "compute_levels",
    "is_stale",
    "meets",
]

REASON_OK, REASON_MISSING, REASON_STALE, REASON_NOWCAST, REASON_SMALL_COUNT = 0, 1, 2, 3, 4
REASON_INVALID = 5  # the value rests on input data found unusable (IndicatorSeries.invalid)
REASON_NO_BASELINE = 6  # no value: its baseline is too short (IndicatorSeries.no_baseline)


@dataclass(frozen=True, kw_only=True, eq=False)
class RegionThresholds:
    """Thresholds of one criterion variant for every region: ``(tiers above 0, regions)``.

    ``enter``/``exit`` are NaN for tiers the criterion cannot reach; ``min_count`` is NaN where
    no minimum applies. Leading tiers the policy leaves null hold the first threshold (the
    criterion jumps straight to its first reachable tier, :attr:`rules.model.Thresholds.filled`);
    ``first`` is, per region, the index of that first tier the policy actually names.
    """

    rising: bool
    enter: NDArray[np.float64]
    exit: NDArray[np.float64]
    enter_strict: NDArray[np.bool_]
    exit_strict: NDArray[np.bool_]
    min_count: NDArray[np.float64]
    first: NDArray[np.int64]


@dataclass(frozen=True, kw_only=True, eq=False)
class CriterionLevels:
    """Precomputed, state-free parts of every criterion (see the module docstring)."""

    known: NDArray[np.bool_]  # (days, criteria, regions)
    reason: NDArray[np.int8]
    enter_level: NDArray[np.int8]
    exit_level: NDArray[np.int8]
    inactive: NDArray[np.bool_]
    max_level: NDArray[np.int8]  # (criteria,)
    thresholds: tuple[RegionThresholds, ...]
    # conditions: index j -> (source criterion, level, target criterion) and alternative arrays
    cond_source: tuple[int, ...]
    cond_level: tuple[int, ...]
    cond_target: tuple[int, ...]
    cond_enter_level: NDArray[np.int8]  # (conditions, days, regions)
    cond_exit_level: NDArray[np.int8]
    cond_inactive: NDArray[np.bool_]
    cond_thresholds: tuple[RegionThresholds, ...]


def meets(
    values: NDArray[np.float64], thr: NDArray[np.float64], strict: NDArray[np.bool_], rising: bool
) -> NDArray[np.bool_]:
    """``values (R, D)`` against ``thr (K, R)``: bool ``(K, R, D)``; NaN on either side is False."""
    v = values[np.newaxis, :, :]
    t = thr[:, :, np.newaxis]
    s = strict[:, :, np.newaxis]
    if rising:
        return np.where(s, v > t, v >= t)
    return np.where(s, v < t, v <= t)


def _highest_level(
    values: NDArray[np.float64], thr: NDArray[np.float64], strict: NDArray[np.bool_], rising: bool
) -> NDArray[np.int8]:
    """Highest k whose thresholds ``thr[:k]`` are all met by ``values (R, D)``: int8 ``(R, D)``.

    The same as counting the leading True rows of ``meets(values, thr, strict, rising)``, but
    without its ``(K, R, D)`` arrays.

    Tier by tier on ``(R, D)``: a value meets ``t`` when ``v > t`` (rising) or when it equals
    ``t`` and the threshold is not strict; the level counts the leading tiers all met.
    """
    level = np.zeros(values.shape, dtype=np.int8)
    alive = np.ones(values.shape, dtype=bool)
    for k in range(thr.shape[0]):
        t = thr[k][:, np.newaxis]
        met = np.greater(values, t) if rising else np.less(values, t)
        s = strict[k]
        if not s.all():
            met |= np.equal(values, t) & ~s[:, np.newaxis]
        alive &= met
        level += alive
    return level


def is_stale(series: IndicatorSeries, max_age_days: float | None) -> NDArray[np.bool_]:
    """Unusable flag ``(R, D)``: the series' ``stale`` mask, data older than ``max_age_days``, or
    the ``invalid`` mask (gates and signals treat invalid data as they treat stale data)."""
    stale = np.zeros(series.shape, dtype=bool) if series.stale is None else series.stale.copy()
    if series.age_days is not None and max_age_days is not None:
        stale |= series.age_days > max_age_days
    if series.invalid is not None:
        stale |= series.invalid
    return stale


def _statistics(
    crit: Criterion, series: IndicatorSeries, name: str
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """(enter statistic, hold statistic) of a criterion."""
    if crit.statistic == "estimate":
        return series.estimate, series.estimate
    if series.lower is None or series.upper is None:
        raise EvaluationInputError(
            f"indicators[{name!r}]",
            f"criterion {crit.id!r} uses bounds but lower/upper are missing",
        )
    if crit.direction == "rising":
        return series.lower, series.upper
    return series.upper, series.lower


def region_thresholds(
    ruleset: Ruleset,
    crit: Criterion,
    regions: Sequence[str],
    region_levels: Sequence[str] | None,
    extra: CriterionPatch | None = None,
) -> RegionThresholds:
    """Thresholds of ``crit`` per region after overrides (and an optional condition patch)."""
    n_r = len(regions)
    codes = np.asarray(regions, dtype=object)
    levels = np.asarray(region_levels if region_levels is not None else [None] * n_r, dtype=object)

    def arrays(th: Thresholds) -> tuple[NDArray[np.float64], ...]:
        fe, fx = th.filled
        e = np.array([np.nan if t is None else t for t in fe], dtype=np.float64)
        x = np.array([np.nan if t is None else t for t in fx], dtype=np.float64)
        es = np.array(th.enter_strict, dtype=bool)
        xs = np.array(th.exit_strict, dtype=bool)
        return tuple(np.repeat(a[:, np.newaxis], n_r, axis=1) for a in (e, x, es, xs))

    def first_named(th: Thresholds) -> int:
        return next(k for k, t in enumerate(th.enter) if t is not None)

    enter, exit_, e_strict, x_strict = arrays(crit.thresholds)
    first = np.full(n_r, first_named(crit.thresholds), dtype=np.int64)
    min_count = np.full(n_r, np.nan if crit.min_count is None else crit.min_count)
    patches: list[tuple[NDArray[np.bool_], CriterionPatch]] = []
    for ov in ruleset.overrides:
        mask = np.isin(codes, list(ov.regions)) | np.isin(levels, list(ov.levels))
        patches += [(mask, p) for p in ov.patches if p.criterion == crit.id]
    if extra is not None:
        patches.append((np.ones(n_r, dtype=bool), extra))
    for mask, patch in patches:
        if patch.thresholds is not None:
            pe, px, pes, pxs = arrays(patch.thresholds)
            enter[:, mask], exit_[:, mask] = pe[:, mask], px[:, mask]
            e_strict[:, mask], x_strict[:, mask] = pes[:, mask], pxs[:, mask]
            first[mask] = first_named(patch.thresholds)
        if patch.min_count is not None:
            min_count[mask] = patch.min_count
    return RegionThresholds(
        rising=crit.direction == "rising",
        enter=enter,
        exit=exit_,
        enter_strict=e_strict.astype(bool),
        exit_strict=x_strict.astype(bool),
        min_count=min_count,
        first=first,
    )


def _variant(
    th: RegionThresholds,
    enter_v: NDArray[np.float64],
    hold_v: NDArray[np.float64],
    count: NDArray[np.float64] | None,
) -> tuple[NDArray[np.int8], NDArray[np.int8], NDArray[np.bool_]]:
    e = _highest_level(enter_v, th.enter, th.enter_strict, th.rising)
    x = _highest_level(hold_v, th.exit, th.exit_strict, th.rising)
    if count is None:
        inactive = np.zeros(enter_v.shape, dtype=bool)
    else:
        inactive = count < th.min_count[:, np.newaxis]  # NaN minimum: never inactive
    return e, x, inactive


def compute_levels(
    ruleset: Ruleset,
    indicators: Mapping[str, IndicatorSeries],
    regions: Sequence[str],
    region_levels: Sequence[str] | None,
) -> CriterionLevels:
    """Precompute known/reason, enter and exit levels and inactivity of every criterion."""
    n_d = next(iter(indicators.values())).shape[1] if indicators else 0
    n_c, n_r = len(ruleset.criteria), len(regions)
    shape = (n_d, n_c, n_r)
    known = np.empty(shape, dtype=bool)
    reason = np.empty(shape, dtype=np.int8)
    enter_level = np.empty(shape, dtype=np.int8)
    exit_level = np.empty(shape, dtype=np.int8)
    inactive = np.empty(shape, dtype=bool)
    thresholds: list[RegionThresholds] = []
    inputs: list[tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64] | None]] = []
    for c, crit in enumerate(ruleset.criteria):
        series = indicators[crit.indicator]
        enter_v, hold_v = _statistics(crit, series, crit.indicator)
        count = series.count
        th = region_thresholds(ruleset, crit, regions, region_levels)
        if count is None and not np.all(np.isnan(th.min_count)):
            raise EvaluationInputError(
                f"indicators[{crit.indicator!r}].count",
                f"criterion {crit.id!r} has a min_count but no counts were given",
            )
        missing = ~(np.isfinite(enter_v) & np.isfinite(hold_v))
        if count is not None and not np.all(np.isnan(th.min_count)):
            missing |= np.isnan(count) & ~np.isnan(th.min_count)[:, np.newaxis]
        stale = is_stale(series, ruleset.indicator(crit.indicator).max_age_days)
        excluded = (
            series.nowcast
            if series.nowcast is not None and not crit.use_nowcast
            else np.zeros(series.shape, dtype=bool)
        )
        e, x, ina = _variant(th, enter_v, hold_v, count)
        invalid = (series.invalid if series.invalid is not None
                   else np.zeros(series.shape, dtype=bool))
        no_base = (series.no_baseline & missing if series.no_baseline is not None
                   else np.zeros(series.shape, dtype=bool))
        code = np.select(  # the first that applies (invalid values are also NaN and stale)
            [invalid, no_base, missing, stale, excluded, ina],
            [REASON_INVALID, REASON_NO_BASELINE, REASON_MISSING, REASON_STALE, REASON_NOWCAST,
             REASON_SMALL_COUNT],
            REASON_OK,
        ).astype(np.int8)
        known[:, c, :] = (~missing & ~stale & ~excluded).T
        reason[:, c, :] = code.T
        enter_level[:, c, :] = e.T
        exit_level[:, c, :] = x.T
        inactive[:, c, :] = ina.T
        thresholds.append(th)
        inputs.append((enter_v, hold_v, count))
    ids = [c.id for c in ruleset.criteria]
    n_j = len(ruleset.conditions)
    cond_e = np.empty((n_j, n_d, n_r), dtype=np.int8)
    cond_x = np.empty((n_j, n_d, n_r), dtype=np.int8)
    cond_i = np.empty((n_j, n_d, n_r), dtype=bool)
    cond_th: list[RegionThresholds] = []
    for j, cond in enumerate(ruleset.conditions):
        t = ids.index(cond.patch.criterion)
        th = region_thresholds(ruleset, ruleset.criteria[t], regions, region_levels, cond.patch)
        e, x, ina = _variant(th, *inputs[t])
        cond_e[j], cond_x[j], cond_i[j] = e.T, x.T, ina.T
        cond_th.append(th)
    return CriterionLevels(
        known=known,
        reason=reason,
        enter_level=enter_level,
        exit_level=exit_level,
        inactive=inactive,
        max_level=np.array([c.thresholds.max_level for c in ruleset.criteria], dtype=np.int8),
        thresholds=tuple(thresholds),
        cond_source=tuple(ids.index(c.source) for c in ruleset.conditions),
        cond_level=tuple(c.level_at_least for c in ruleset.conditions),
        cond_target=tuple(ids.index(c.patch.criterion) for c in ruleset.conditions),
        cond_enter_level=cond_e,
        cond_exit_level=cond_x,
        cond_inactive=cond_i,
        cond_thresholds=tuple(cond_th),
    )
