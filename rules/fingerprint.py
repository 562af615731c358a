"""A 64-bit fingerprint per region and day of everything its stored assessment is made of.

An assessment row (tier, previous tier, criteria, prepare signals) and its explanation
(:func:`rules.explanation.explain`) are a deterministic function of the :class:`Evaluation`'s
arrays at that region, on that day and on the ``max(effective_delay_days, 1)`` days before it
(the day a move was decided, ``decided_on``, is ``effective_delay_days`` back; the previous tier
and a pending decision look back as far), of per-region constants (thresholds, the start state,
the nowcast basis), of the ruleset text and of the code that writes them. :func:`fingerprints`
folds exactly those inputs into one ``uint64`` per region and day, vectorised:

* per day: tier, decided tier, candidate and its bounds, the up/down/since counters, gates
  passed, the testing hold; per criterion its level, known flag, reason, above/below counters
  and enter level (plain and under each condition); per gate its result; per prepare signal
  whether it shows and its run; the indicator fields the explanation reads (``_fields_read``:
  a criterion's value, bounds, count, age and nowcast days and basis where it is a nowcast, a
  gate's value, a signal's value and bounds when its message shows them, the testing change),
  a missing array as the explanation reads it (values NaN, flags False: both are written
  alike). An indicator read only by a signal without ``{reading}`` (Rt, whose whole history
  moves a little with each new day) enters through the signal's arrays alone;
* per region: each criterion's and condition's thresholds (enter, exit, strictness, first named
  tier, minimum count), the tier decided and in force before the first day;
* the window: a day's fingerprint mixes the per-day hashes of the day and of the ``W`` days
  before it, a marker standing for each day before the first (so the first days of a period,
  where the explanation reads the start state or says "decided before this period", differ
  from the same dates evaluated from an earlier start);
* ``salt``: the ruleset's sha256 and what the caller adds (the code's version).

Equal fingerprints mean equal rows (up to a 64-bit hash collision, about 5e-20 per changed
region-day); a fingerprint may differ where the row does not (NaN payloads, a field the
explanation ignores), which only costs building that row. Pure numpy, no I/O.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterator

import numpy as np
from numpy.typing import NDArray

from rules.evaluation import Evaluation
from rules.ruleset import Ruleset
from rules.series import IndicatorSeries

__all__ = ["fingerprints", "window_days"]

U64 = NDArray[np.uint64]

_M1 = np.array(0xBF58476D1CE4E5B9, dtype=np.uint64)
_M2 = np.array(0x94D049BB133111EB, dtype=np.uint64)
_GOLDEN = np.array(0x9E3779B97F4A7C15, dtype=np.uint64)
_S31, _S27, _S30 = (np.array(s, dtype=np.uint64) for s in (31, 27, 30))
#: stands for a day before the first
_BEFORE = np.array(0xC2B2AE3D27D4EB4F, dtype=np.uint64)
_NAN = np.array(np.nan, dtype=np.float64).view(np.uint64)


def _mix(h: U64, x: U64 | np.uint64) -> U64:
    """Fold ``x`` into ``h`` (splitmix64's finaliser on ``h ^ x``; uint64 arrays wrap)."""
    h = (h ^ x) + _GOLDEN
    h ^= h >> _S30
    h *= _M1
    h ^= h >> _S27
    h *= _M2
    h ^= h >> _S31
    return h


def _bits(a: NDArray[np.generic]) -> U64:
    """Values as uint64 bit patterns: floats by their IEEE bits (every NaN the same), integers
    and booleans by value."""
    if np.issubdtype(a.dtype, np.floating):
        f = np.ascontiguousarray(a, dtype=np.float64)
        return np.where(np.isnan(f), _NAN, f.view(np.uint64))
    return np.asarray(a).astype(np.int64).view(np.uint64)


def _text(value: str) -> np.uint64:
    return np.uint64(int.from_bytes(hashlib.sha256(value.encode("utf-8")).digest()[:8], "big"))


def window_days(ev: Evaluation) -> int:
    """Days before a day that its row and explanation read (see the module docstring)."""
    return max(int(ev.ruleset.timing.effective_delay_days), 1)


def _day_arrays(ev: Evaluation) -> Iterator[NDArray[np.generic]]:
    """Every ``(regions, days)`` array an assessment reads."""
    yield from (ev.tier, ev.decided, ev.candidate, ev.candidate_low, ev.candidate_high,
                ev.up, ev.down, ev.since, ev.sufficient)
    yield ev.testing_held if ev.testing_held.size else np.zeros(ev.tier.shape, dtype=bool)
    lv = ev.criterion_levels
    for c in range(len(ev.ruleset.criteria)):
        yield from (ev.levels[c], ev.known[c], ev.reason[c], ev.above[c], ev.below[c],
                    lv.enter_level[:, c, :].T)
    for j in range(len(lv.cond_target)):
        yield lv.cond_enter_level[j].T
    yield from ev.gates
    for k in range(len(ev.ruleset.prepare)):
        yield from (ev.prepare[k], ev.prepare_run[k])
    for name, fields in _fields_read(ev.ruleset).items():
        yield from _series_arrays(ev.indicators[name], fields)


def _fields_read(ruleset: Ruleset) -> dict[str, set[str]]:
    """The fields of each indicator that an explanation reads: a criterion's all of them (value,
    bounds, count, age, nowcast), a gate's estimate, a prepare signal's value and bounds only
    when its message shows the ``{reading}``, the testing hold's days, size and bounds. What
    else an indicator does (stale, invalid, no baseline, a signal's run) reaches the row only
    through the engine's arrays above."""
    out: dict[str, set[str]] = {name: set() for name in ruleset.used_indicators()}
    for c in ruleset.criteria:
        out[c.indicator] |= {"estimate", "lower", "upper", "count", "age_days", "nowcast"}
    for g in ruleset.gates:
        if g.indicator is not None:
            out[g.indicator].add("estimate")
    for sig in ruleset.prepare:
        if "{reading}" in sig.message:
            out[sig.indicator] |= {"estimate", "lower", "upper"}
    if ruleset.testing_hold is not None:
        out[ruleset.testing_hold.indicator] |= {"estimate", "size", "lower", "upper"}
    return out


_VALUES = ("estimate", "lower", "upper", "count", "age_days", "size")


def _series_arrays(s: IndicatorSeries, fields: set[str]) -> Iterator[NDArray[np.generic]]:
    """The ``fields`` of a series as the explanation reads them: a missing value array reads
    as NaN (both are written None); nowcast days and basis only where the value is a nowcast
    (``_criterion_item`` reads them only there), a missing flag as False."""
    nan = np.full(s.shape, np.nan)
    for name in _VALUES:
        values = getattr(s, name)
        yield nan if values is None or name not in fields else values
    if "nowcast" not in fields:
        return
    nowcast = np.zeros(s.shape, dtype=bool) if s.nowcast is None else s.nowcast
    yield nowcast
    yield np.where(nowcast, nan if s.nowcast_days is None else s.nowcast_days, np.nan)
    basis = (np.zeros(s.shape[0], dtype=np.uint64) if s.nowcast_basis is None
             else np.array([_text(b) for b in s.nowcast_basis], dtype=np.uint64))
    yield np.where(nowcast, basis[:, np.newaxis], np.uint64(0)).astype(np.uint64)


def _region_values(ev: Evaluation) -> Iterator[NDArray[np.generic]]:
    """Every per-region ``(n, regions)`` or ``(regions,)`` array an assessment reads."""
    lv = ev.criterion_levels
    for th in (*lv.thresholds, *lv.cond_thresholds):
        yield from (th.enter, th.exit, th.enter_strict, th.exit_strict, th.min_count, th.first)
    yield from (ev.start_tier, ev.start_in_force)


def _mix_in(h: U64, x: U64, tmp: U64) -> None:
    """:func:`_mix` in place, without temporaries (``tmp``: a scratch array of ``h``'s shape);
    the ``(regions, days)`` arrays are folded this way."""
    np.bitwise_xor(h, x, out=h)
    np.add(h, _GOLDEN, out=h)
    for shift, factor in ((_S30, _M1), (_S27, _M2), (_S31, None)):
        np.right_shift(h, shift, out=tmp)
        np.bitwise_xor(h, tmp, out=h)
        if factor is not None:
            np.multiply(h, factor, out=h)


def fingerprints(ev: Evaluation, salt: bytes = b"") -> U64:
    """One ``uint64`` per region and day, ``(regions, days)`` (module docstring)."""
    n_r, n_d = ev.tier.shape
    seed = _text(ev.ruleset.sha256 + "\n" + salt.hex())
    per_region = np.full(n_r, seed, dtype=np.uint64)
    for tag, a in enumerate(_region_values(ev)):
        per_region = _mix(per_region, np.uint64(tag))
        rows = _bits(np.asarray(a)).reshape(-1, n_r)
        for row in rows:
            per_region = _mix(per_region, row)
    day = np.broadcast_to(per_region[:, np.newaxis], (n_r, n_d)).copy()
    tmp = np.empty_like(day)
    for tag, a in enumerate(_day_arrays(ev)):
        x = _bits(a)  # a new array: the component's place is added to it
        np.add(x, np.uint64((0x9E3779B97F4A7C15 * (tag + 1)) % 2**64), out=x)
        _mix_in(day, x, tmp)
    out = day.copy()
    shifted = np.empty_like(day)
    for w in range(1, window_days(ev) + 1):
        shifted[:, :w] = _BEFORE
        shifted[:, w:] = day[:, : max(n_d - w, 0)]
        _mix_in(out, shifted, tmp)
    return out
