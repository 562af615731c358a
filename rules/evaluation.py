"""The evaluator: indicator arrays and a ruleset in, tiers, states and explanations out.

``evaluate`` is pure and deterministic. It precomputes every state-free comparison over the whole
``(regions, days)`` arrays (:mod:`rules.levels`), then loops over days; each day is numpy over the
region axis: criterion hysteresis bands, conditional thresholds, combination into candidate bounds,
gates and the tier transition (:mod:`rules.hysteresis`). Prepare signals follow
(:mod:`rules.signals`). Explanations are built on demand by :meth:`Evaluation.explain`.

Tier codes: ``0..N`` are the ruleset's tiers; :data:`~rules.ruleset.INSUFFICIENT_DATA` (``-1``)
marks a region and day whose gate failed.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from rules.errors import EvaluationInputError
from rules.hysteresis import TierState, candidate_bounds, step_tiers
from rules.levels import CriterionLevels, compute_levels, is_stale
from rules.ruleset import INSUFFICIENT_DATA, Ruleset
from rules.series import IndicatorSeries
from rules.signals import SignalState, compare, evaluate_signals

if TYPE_CHECKING:
    from rules.explanation import Explanation

__all__ = ["EngineState", "Evaluation", "evaluate"]


@dataclass(frozen=True, kw_only=True, eq=False)
class EngineState:
    """Everything the next day's evaluation needs; ``Evaluation.final_state`` feeds the next run.

    Attributes
    ----------
    tiers : TierState
        Hysteresis counters per region.
    levels : int8 array, (criteria, regions)
        Each criterion's current level (its hysteresis band).
    history : int32 array, (effective_delay_days, regions)
        Tiers decided on the last days, oldest first; the oldest is the tier in force tomorrow.
    signals : SignalState
        Prepare-signal runs.
    above, below : int32 array, (criteria, regions)
        Each criterion's consecutive days above / below the tier held.
    """

    tiers: TierState
    levels: NDArray[np.int8]
    history: NDArray[np.int32]
    signals: SignalState
    above: NDArray[np.int32]
    below: NDArray[np.int32]

    @classmethod
    def initial(cls, ruleset: Ruleset, n_regions: int, tier: int = 0) -> EngineState:
        """All regions at ``tier``, criteria at ``tier`` (capped at each criterion's top)."""
        if not 0 <= tier <= ruleset.top_tier:
            raise EvaluationInputError("tier", f"{tier} is not a tier of {ruleset.name!r}")
        tops = np.array([c.thresholds.max_level for c in ruleset.criteria], dtype=np.int8)
        levels = np.repeat(np.minimum(tops, tier)[:, np.newaxis], n_regions, axis=1)
        history = np.full((ruleset.timing.effective_delay_days, n_regions), tier, dtype=np.int32)
        zeros = np.zeros((len(ruleset.criteria), n_regions), dtype=np.int32)
        return cls(
            tiers=TierState.initial(n_regions, tier),
            levels=levels.astype(np.int8),
            history=history,
            signals=SignalState.initial(len(ruleset.prepare), n_regions),
            above=zeros,
            below=zeros.copy(),
        )


@dataclass(frozen=True, kw_only=True, eq=False)
class Evaluation:
    """Per region and day results; arrays are ``(regions, days)`` unless stated.

    Attributes
    ----------
    tier : int8 array
        Tier in force (decisions shifted by ``effective_delay_days``), or -1 for insufficient data.
    decided : int8 array
        Tier decided on that day from that day's data (before the effective delay and the gates).
    candidate, candidate_low, candidate_high : int8 array
        The candidate the tier reacted to, and its bounds with unknown criteria at 0 / at top.
    up, down, since : int32 array
        Consecutive days the candidate was higher / lower; days since the last decided change.
    sufficient : bool array
        All gates passed. ``gates`` is ``(gates, regions, days)``.
    levels, known, reason : arrays ``(criteria, regions, days)``
        Criterion level, whether it was known, and why not (:mod:`rules.levels` reason codes).
    above, below : int32 arrays ``(criteria, regions, days)``
        Per-criterion counters: consecutive days (up to and including the day) on which the
        criterion was known and its level above / below the tier held that morning (the tier
        decided the day before). An unknown day ends the run; a day whose gate fails freezes it.
    prepare, prepare_run : arrays ``(signals, regions, days)``
        Whether each prepare signal shows, and its current run length.
    testing_held : bool array
        The policy's ``testing_hold`` took an escalation away that day: the case-based
        criteria alone called for a higher candidate within the days after a testing change
        and no criterion independent of testing agreed (all False without the option).

    Notes
    -----
    ``levels``, ``known``, ``reason``, ``above`` and ``below`` are transposed views of the
    day-major buffers the day loop fills (``(days, criteria, regions)``), not copies: the values
    are indexed as documented, but the arrays are not C-contiguous and share memory with
    ``criterion_levels``. Treat every array as read-only.
    """

    ruleset: Ruleset
    regions: tuple[str, ...]
    dates: NDArray[np.datetime64]
    indicators: Mapping[str, IndicatorSeries]
    tier: NDArray[np.int8]
    decided: NDArray[np.int8]
    candidate: NDArray[np.int8]
    candidate_low: NDArray[np.int8]
    candidate_high: NDArray[np.int8]
    up: NDArray[np.int32]
    down: NDArray[np.int32]
    since: NDArray[np.int32]
    sufficient: NDArray[np.bool_]
    gates: NDArray[np.bool_]
    levels: NDArray[np.int8]
    known: NDArray[np.bool_]
    reason: NDArray[np.int8]
    prepare: NDArray[np.bool_]
    prepare_run: NDArray[np.int32]
    above: NDArray[np.int32]
    below: NDArray[np.int32]
    start_tier: NDArray[np.int32]
    start_in_force: NDArray[np.int32]
    final_state: EngineState
    criterion_levels: CriterionLevels = field(repr=False)
    testing_held: NDArray[np.bool_] = field(default_factory=lambda: np.zeros((0, 0), bool))

    def explain(self, region_index: int, day_index: int) -> Explanation:
        """Structured explanation and one or two sentences for one region and day."""
        from rules.explanation import explain

        return explain(self, region_index, day_index)


def _validate(
    ruleset: Ruleset,
    indicators: Mapping[str, IndicatorSeries],
    regions: Sequence[str],
    dates: NDArray[np.datetime64],
    region_levels: Sequence[str] | None,
    start_state: EngineState | None,
) -> NDArray[np.datetime64]:
    n_r = len(regions)
    if len(set(regions)) != n_r:
        raise EvaluationInputError("regions", "region codes must be unique")
    d = np.asarray(dates)
    if d.ndim != 1 or not np.issubdtype(d.dtype, np.datetime64):
        raise EvaluationInputError("dates", f"expected a 1-D datetime64 array, got {d.dtype}")
    d = d.astype("datetime64[D]")
    if d.size > 1 and np.any(np.diff(d) != np.timedelta64(1, "D")):
        raise EvaluationInputError("dates", "dates must be consecutive days")
    for name in ruleset.used_indicators():
        if name not in indicators:
            raise EvaluationInputError("indicators", f"missing indicator {name!r}")
        series = indicators[name]
        if not isinstance(series, IndicatorSeries):
            raise EvaluationInputError(f"indicators[{name!r}]", "expected an IndicatorSeries")
        if series.shape != (n_r, d.size):
            raise EvaluationInputError(
                f"indicators[{name!r}]",
                f"shape {series.shape} does not match ({n_r} regions, {d.size} days)",
            )
    if region_levels is not None and len(region_levels) != n_r:
        raise EvaluationInputError(
            "region_levels", f"{len(region_levels)} levels for {n_r} regions"
        )
    if start_state is not None:
        if start_state.levels.shape != (len(ruleset.criteria), n_r):
            raise EvaluationInputError(
                "start_state", f"levels shape {start_state.levels.shape} does not fit the ruleset"
            )
        if start_state.history.shape[0] != ruleset.timing.effective_delay_days:
            raise EvaluationInputError("start_state", "history does not match the effective delay")
    return d


def _gates(
    ruleset: Ruleset,
    indicators: Mapping[str, IndicatorSeries],
    lv: CriterionLevels,
    shape: tuple[int, int],
) -> NDArray[np.bool_]:
    ids = [c.id for c in ruleset.criteria]
    out = np.ones((len(ruleset.gates), *shape), dtype=bool)
    for g, gate in enumerate(ruleset.gates):
        if gate.indicator is not None and gate.op is not None and gate.value is not None:
            series = indicators[gate.indicator]
            stale = is_stale(series, ruleset.indicator(gate.indicator).max_age_days)
            out[g] &= compare(series.estimate, gate.op, gate.value) & ~stale
        for cid in gate.known:
            out[g] &= lv.known[:, ids.index(cid), :].T
    return out


def _hold_days(ruleset: Ruleset, indicators: Mapping[str, IndicatorSeries]
               ) -> tuple[NDArray[np.bool_] | None, list[int], list[int]]:
    """(days, regions) within the testing hold, held and agreeing criterion indices."""
    hold = ruleset.testing_hold
    if hold is None:
        return None, [], []
    ids = [c.id for c in ruleset.criteria]
    since = indicators[hold.indicator].estimate
    with np.errstate(invalid="ignore"):
        on = (since >= 0) & (since < hold.days)
    return (np.ascontiguousarray(on.T), [ids.index(c) for c in hold.criteria],
            [ids.index(c) for c in hold.unless])


def evaluate(
    ruleset: Ruleset,
    indicators: Mapping[str, IndicatorSeries],
    *,
    regions: Sequence[str],
    dates: NDArray[np.datetime64],
    region_levels: Sequence[str] | None = None,
    start_state: EngineState | None = None,
) -> Evaluation:
    """Apply ``ruleset`` to every region and day.

    Parameters
    ----------
    ruleset : Ruleset
    indicators : mapping of indicator name to IndicatorSeries
        Every indicator the ruleset uses, shaped ``(len(regions), len(dates))``.
    regions : sequence of str
        Region codes, matched by overrides' ``regions``.
    dates : datetime64 array
        Consecutive days.
    region_levels : sequence of str, optional
        Each region's level (e.g. ``small_district``), matched by overrides' ``levels``.
    start_state : EngineState, optional
        State at the end of the day before ``dates[0]``; default: every region at tier 0.

    Returns
    -------
    Evaluation
    """
    d_arr = _validate(ruleset, indicators, regions, dates, region_levels, start_state)
    n_r, n_d = len(regions), d_arr.size
    lv = compute_levels(ruleset, indicators, regions, region_levels)
    state = start_state or EngineState.initial(ruleset, n_r)
    gates = _gates(ruleset, indicators, lv, (n_r, n_d))
    ok_all: NDArray[np.bool_] = np.ones((n_r, n_d), dtype=bool)
    if len(ruleset.gates):
        ok_all = np.logical_and.reduce(gates, axis=0)
    ok_t = np.ascontiguousarray(ok_all.T)
    comb = ruleset.combination
    ids = [c.id for c in ruleset.criteria]
    weights = np.array([comb.weights.get(i, 0.0) for i in ids], dtype=np.float64)
    cutoffs = np.asarray(comb.cutoffs, dtype=np.float64)
    max_level = lv.max_level.copy()
    for cond, t in zip(ruleset.conditions, lv.cond_target, strict=True):
        if cond.patch.thresholds is not None:
            max_level[t] = max(int(max_level[t]), cond.patch.thresholds.max_level)
    n_c = len(ids)
    # state-free parts folded once over all days: an inactive criterion has level 0 whatever
    # the tier held (max(0, min(T, 0)) = 0 as T >= 0), so its enter and exit levels become 0
    enter_lv = np.where(lv.inactive, 0, lv.enter_level).astype(np.int8, copy=False)
    exit_lv = np.where(lv.inactive, 0, lv.exit_level).astype(np.int8, copy=False)
    cond_enter = np.where(lv.cond_inactive, 0, lv.cond_enter_level).astype(np.int8, copy=False)
    cond_exit = np.where(lv.cond_inactive, 0, lv.cond_exit_level).astype(np.int8, copy=False)
    unknown = ~lv.known
    all_ok = np.asarray(ok_t.all(axis=1))  # an array, also to the type checker
    levels_out = np.empty((n_d, n_c, n_r), dtype=np.int8)
    above_out = np.empty((n_d, n_c, n_r), dtype=np.int32)
    below_out = np.empty((n_d, n_c, n_r), dtype=np.int32)
    above, below = state.above.copy(), state.below.copy()
    out = {
        k: np.empty((n_d, n_r), dtype=np.int32)
        for k in ("decided", "cand", "low", "high", "up", "down", "since")
    }
    prev = state.levels.astype(np.int8)
    tiers = state.tiers
    conds = list(zip(lv.cond_source, lv.cond_level, lv.cond_target, strict=True))
    band = np.empty((n_c, n_r), dtype=np.int8)
    hold_on, held_idx, unless_idx = _hold_days(ruleset, indicators)
    hold_any: NDArray[np.bool_] = (np.zeros(n_d, dtype=bool) if hold_on is None
                                   else np.asarray(hold_on.any(axis=1)))
    testing_held = np.zeros((n_d, n_r), dtype=bool)
    for d in range(n_d):
        kn = lv.known[d]
        held = tiers.tier.astype(np.int8)  # the tier already held: kept while exit is met
        cur = levels_out[d]
        np.minimum(exit_lv[d], held, out=band)
        np.maximum(band, enter_lv[d], out=cur)
        for j, (src, lvl, tgt) in enumerate(conds):
            alt = np.maximum(cond_enter[j, d], np.minimum(held, cond_exit[j, d]))
            on = np.where(kn[src], cur[src], prev[src]) >= lvl  # unknown source: carried level
            np.copyto(cur[tgt], alt, where=on)
        np.copyto(cur, prev, where=unknown[d])  # unknown: level carried
        low, high = candidate_bounds(cur, kn, max_level, comb, weights, cutoffs)
        if hold_any[d]:  # case-based escalations held after a testing change
            assert hold_on is not None
            hold_now = hold_on[d].copy()
            if unless_idx:
                hold_now &= ~np.any(kn[unless_idx] & (cur[unless_idx] > held), axis=0)
            capped = cur.copy()
            capped[held_idx] = np.where(hold_now, np.minimum(cur[held_idx], held),
                                        cur[held_idx])
            free = low
            low, high = candidate_bounds(capped, kn, max_level, comb, weights, cutoffs)
            testing_held[d] = hold_now & (free > np.maximum(low, held))
        ok = ok_t[d]
        a_out, b_out = above_out[d], below_out[d]
        np.add(above, 1, out=a_out)
        a_out *= kn & (cur > held)
        np.add(below, 1, out=b_out)
        b_out *= kn & (cur < held)
        if not all_ok[d]:  # a failed gate freezes the counters
            np.copyto(a_out, above, where=~ok)
            np.copyto(b_out, below, where=~ok)
        above, below = a_out, b_out
        tiers, cand = step_tiers(tiers, low, high, ok, ruleset.timing)
        prev = cur
        out["decided"][d], out["cand"][d] = tiers.tier, cand
        out["low"][d], out["high"][d] = low, high
        out["up"][d], out["down"][d], out["since"][d] = tiers.up, tiers.down, tiers.since
    decided = out["decided"].T
    delay = ruleset.timing.effective_delay_days
    history = np.concatenate([state.history, decided.T], axis=0)  # (delay + days, regions)
    in_force = history[:n_d].T if delay else decided
    tier = np.where(ok_all, in_force, INSUFFICIENT_DATA).astype(np.int8)
    shown, _met, run, sig_state = evaluate_signals(
        ruleset, indicators, tier.astype(np.int32), state.signals
    )
    final = EngineState(
        tiers=tiers,
        levels=prev.copy(),
        history=history[history.shape[0] - delay :].astype(np.int32),
        signals=sig_state,
        above=above.astype(np.int32),
        below=below.astype(np.int32),
    )
    start_in_force = state.history[0] if delay else state.tiers.tier
    return Evaluation(
        ruleset=ruleset,
        regions=tuple(regions),
        dates=d_arr,
        indicators=dict(indicators),
        tier=tier,
        decided=decided.astype(np.int8),
        candidate=out["cand"].T.astype(np.int8),
        candidate_low=out["low"].T.astype(np.int8),
        candidate_high=out["high"].T.astype(np.int8),
        up=out["up"].T.copy(),
        down=out["down"].T.copy(),
        since=out["since"].T.copy(),
        sufficient=ok_all,
        gates=gates,
        levels=levels_out.transpose(1, 2, 0),
        known=lv.known.transpose(1, 2, 0),
        reason=lv.reason.transpose(1, 2, 0),
        prepare=shown,
        prepare_run=run,
        above=above_out.transpose(1, 2, 0),
        below=below_out.transpose(1, 2, 0),
        start_tier=state.tiers.tier.copy(),
        start_in_force=np.asarray(start_in_force, dtype=np.int32).copy(),
        final_state=final,
        criterion_levels=lv,
        testing_held=testing_held.T.copy(),
    )
