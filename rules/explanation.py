"""Explanations of one region and day, built on demand from an :class:`Evaluation`.

An :class:`Explanation` has a JSON-ready ``data`` dict (which criteria, values and bounds,
thresholds, counters, gates, signals, and what held a change back) and a plain ``sentence``. The
sentence speaks of the tier *in force* on the day and names every tier by the ruleset's name with
its number (:meth:`~rules.ruleset.Ruleset.tier_name`), as the pages do:

* the day a move takes effect: "Raised from Heightened (1) to High (2) on 2031-05-14: 7-day
  incidence 162 (148–177) per 100 000 over the enter threshold 150 for 3 of 3 days; positivity
  8.1% under 10% (decided on 2031-05-13)." The criteria are described as they stood on the day of
  the decision; a fall reads "Lowered from High (2) to Heightened (1) on ...", with "(at most 1
  step(s) down at once; candidate Baseline (0))" when the step limit cut it short;
* a day a move is decided but not yet in force: "Held at Heightened (1): raise to High (2) decided
  on 2031-05-13, in force from 2031-05-14: ..." ("lowering to ..." for a fall);
* a day a move is held back: "Held at High (2): 9 of 14 release days so far (...)", "Held at
  High (2): 3 of 7 minimum days in tier (...)", "Held at Baseline (0): 2 of 3 confirmation days
  so far for Heightened (1) (...)", "Held at High (2): wastewater data 5 days old.";
* otherwise "Stays at Severe (3): ..." with the criteria that hold the tier first ("over the enter
  threshold", or "held above the exit threshold" inside the hysteresis band), then the others
  ("under 150", or ", at its top tier Heightened (1)" for one that cannot reach the tier);
* a day a gate fails (tier -1, named by no number): "Insufficient data on 2031-05-14: tests 100
  per 100 000, needs at least 150 per 100 000."

Within a policy's ``testing_hold`` days after a testing change the sentence ends "Testing: tests
rose 60% from 2031-03-02: part of the rise in cases reflects more testing."; a day on which the
hold took an escalation away reads "Held at Baseline (0): held back by testing change (...)".

A threshold of the tier the sentence is about is "the enter threshold 150"; one of another tier
names that tier: "the High (2) enter threshold 150". Unknown criteria follow "Unknown:", active
prepare signals "Prepare:". A known criterion whose value is a nowcast is named after
"Nowcast:": "7-day incidence rests on a nowcast of 3 incomplete days (reporting delays pooled
over North)."
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from rules.formatting import (
    change_text,
    level_names,
    number_text,
    reading_text,
    value_text,
    with_unit,
)
from rules.levels import (
    REASON_INVALID,
    REASON_MISSING,
    REASON_NO_BASELINE,
    REASON_NOWCAST,
    REASON_SMALL_COUNT,
    REASON_STALE,
    RegionThresholds,
)
from rules.model import Criterion, IndicatorSpec
from rules.ruleset import INSUFFICIENT_DATA

if TYPE_CHECKING:
    from rules.evaluation import Evaluation

__all__ = ["Explanation", "explain", "signal_message", "testing_text"]

_REASONS = {
    0: "ok",
    REASON_MISSING: "missing",
    REASON_STALE: "stale",
    REASON_NOWCAST: "nowcast excluded",
    REASON_SMALL_COUNT: "count below minimum",
    REASON_INVALID: "invalid",
    REASON_NO_BASELINE: "no baseline",
}


@dataclass(frozen=True, kw_only=True)
class Explanation:
    """Why a region has its tier on a day: structured ``data`` (JSON-ready) and a ``sentence``."""

    data: dict[str, Any]
    sentence: str


def _num(x: float) -> float | None:
    return None if x is None or not math.isfinite(float(x)) else float(x)


def signal_message(ev: Evaluation, signal: int, r: int, d: int) -> str:
    """Prepare signal ``signal``'s message for region ``r`` on day ``d``, with ``{reading}``
    replaced by its indicator's value and interval that day ("9 (6–14) days";
    :func:`rules.formatting.reading_text`)."""
    sig = ev.ruleset.prepare[signal]
    message = sig.message
    if "{reading}" not in message:
        return message
    series, spec = ev.indicators[sig.indicator], ev.ruleset.indicator(sig.indicator)

    def at(values: Any) -> float | None:
        return None if values is None else _num(values[r, d])

    text = reading_text(spec, at(series.estimate), at(series.lower), at(series.upper))
    return message.replace("{reading}", text)


def _value_text(spec: IndicatorSpec, item: dict[str, Any]) -> str:
    if item["statistic"] == "bounds":
        return reading_text(spec, item["value"], item["lower"], item["upper"])
    return with_unit(spec, number_text(spec, item["value"]))


def _criterion_item(ev: Evaluation, c: int, r: int, d: int) -> dict[str, Any]:
    crit: Criterion = ev.ruleset.criteria[c]
    series = ev.indicators[crit.indicator]
    lv = ev.criterion_levels
    th: RegionThresholds = lv.thresholds[c]
    conditioned = None
    enter_level = int(lv.enter_level[d, c, r])
    for j, (src, lvl, tgt) in enumerate(
        zip(lv.cond_source, lv.cond_level, lv.cond_target, strict=True)
    ):
        if tgt == c and ev.levels[src, r, d] >= lvl:
            th, conditioned = lv.cond_thresholds[j], ev.ruleset.criteria[src].id
            enter_level = int(lv.cond_enter_level[j, d, r])
    age = None if series.age_days is None else _num(series.age_days[r, d])
    nowcast = bool(series.nowcast is not None and series.nowcast[r, d])
    return {
        "id": crit.id,
        "indicator": crit.indicator,
        "label": crit.label or ev.ruleset.indicator(crit.indicator).label,
        "direction": crit.direction,
        "statistic": crit.statistic,
        "value": _num(series.estimate[r, d]),
        "lower": None if series.lower is None else _num(series.lower[r, d]),
        "upper": None if series.upper is None else _num(series.upper[r, d]),
        "count": None if series.count is None else _num(series.count[r, d]),
        "age_days": age,
        "level": int(ev.levels[c, r, d]),
        "enter_level": enter_level,
        "known": bool(ev.known[c, r, d]),
        "status": _REASONS[int(ev.reason[c, r, d])],
        "above_days": int(ev.above[c, r, d]),
        "below_days": int(ev.below[c, r, d]),
        # as the policy names them: None for the leading tiers it leaves null (see _threshold)
        "enter": [None if k < th.first[r] else _num(v) for k, v in enumerate(th.enter[:, r])],
        "exit": [None if k < th.first[r] else _num(v) for k, v in enumerate(th.exit[:, r])],
        "min_count": _num(th.min_count[r]),
        "conditioned_by": conditioned,
        # None unless this value is a nowcast, so that a record does not change with the flags
        # of other regions or days
        "nowcast": nowcast,
        "nowcast_days": _num(series.nowcast_days[r, d])
        if nowcast and series.nowcast_days is not None else None,
        "nowcast_basis": series.nowcast_basis[r]
        if nowcast and series.nowcast_basis is not None else None,
    }


def _nowcast_text(ev: Evaluation, item: dict[str, Any]) -> str:
    """'<label> rests on a nowcast of N incomplete days (basis)' for a known nowcast value."""
    label = ev.ruleset.indicator(item["indicator"]).label
    days = item.get("nowcast_days")
    what = (f"a nowcast of {days:g} incomplete day{'s' if days != 1 else ''}"
            if days else "a nowcast")
    basis = f" ({item['nowcast_basis']})" if item.get("nowcast_basis") else ""
    return f"{label} rests on {what}{basis}"


def _unknown_text(ev: Evaluation, item: dict[str, Any]) -> str:
    label = ev.ruleset.indicator(item["indicator"]).label
    if item["status"] == "stale" and item["age_days"] is not None:
        return f"{label} data {item['age_days']:g} days old"
    if item["status"] == "nowcast excluded":
        return f"{label} still incomplete (nowcasts not used)"
    if item["status"] == "invalid":
        return f"{label} data invalid (a stored value cannot be used)"
    if item["status"] == "no baseline":
        return f"{label} has no baseline yet (not enough past seasons)"
    return f"{label} data {item['status']}"


def _threshold(ev: Evaluation, item: dict[str, Any], kind: str, tier: int) -> float | None:
    """The threshold the engine applies for ``tier``: a leading tier the policy leaves null
    takes the first named one (the criterion jumps straight to that tier)."""
    values = item[kind]
    if not 1 <= tier <= len(values):
        return None
    if values[tier - 1] is None:
        return next((v for v in values[tier - 1 :] if v is not None), None)
    return values[tier - 1]


def _thr_text(ev: Evaluation, item: dict[str, Any], thr: float) -> str:
    spec = ev.ruleset.indicator(item["indicator"])
    if level_names(spec) is not None and float(thr).is_integer():
        return number_text(spec, thr)  # "medium (2)", "growing (3)"
    return f"{thr:g}" + ("%" if spec.unit.startswith("%") else "")


def _tier(ev: Evaluation, level: int) -> str:
    """A tier as the sentences name it: its name from the ruleset and its number, "High (2)"."""
    return f"{ev.ruleset.tier_name(level)} ({level})"


def _days(k: int, n: int | None) -> str:
    return f" for {k} of {n} days" if n is not None and k <= n else f" for {k} days"


def _describe(
    ev: Evaluation, item: dict[str, Any], tier: int, *, named: int, counter: int | None = None
) -> str:
    """One criterion relative to the tier ``tier`` held (see the module docstring).

    Thresholds of tier ``named`` are written without their tier, those of other tiers with it
    ("the High (2) enter threshold 150"); ``counter`` is the period the day counts are shown
    against (confirmation or release days).
    """
    spec = ev.ruleset.indicator(item["indicator"])
    head = f"{item['label']} {_value_text(spec, item)}"
    if item["status"] == "count below minimum":
        count = "n/a" if item["count"] is None else f"{item['count']:g}"
        return f"{head} inactive (count {count} under the minimum {item['min_count']:g})"
    rising = item["direction"] == "rising"
    over, under = ("over", "under") if rising else ("under", "over")
    bound = item["statistic"] == "bounds"
    level = item["level"]

    def name(kind: str, k: int) -> str:
        thr = _threshold(ev, item, kind, k)
        label = "" if k == named else f"{_tier(ev, k)} "
        return f"the {label}{kind} threshold {_thr_text(ev, item, thr or 0.0)}"

    if level > tier:
        return f"{head} {over} {name('enter', level)}" + _days(item["above_days"], counter)
    if level < tier:
        thr = _threshold(ev, item, "exit", tier)
        if thr is None:  # the criterion cannot reach this tier at all
            return f"{head}, at its top tier {_tier(ev, level)}" if level else head
        word = (", upper bound " if rising else ", lower bound ") + under if bound else f" {under}"
        return f"{head}{word} {name('exit', tier)}" + _days(item["below_days"], counter)
    if level >= 1:
        if item["enter_level"] >= level:
            return f"{head} {over} {name('enter', level)}"
        held = "held above" if rising else "held below"
        if bound:
            return f"{head}, {'upper' if rising else 'lower'} bound {held} {name('exit', level)}"
        return f"{head} {held} {name('exit', level)}"
    return _short_of(ev, item, 1)


def _short_of(ev: Evaluation, item: dict[str, Any], tier: int) -> str:
    """'<label> <value> under <enter threshold of tier>' for a criterion below ``tier``."""
    spec = ev.ruleset.indicator(item["indicator"])
    head = f"{item['label']} {_value_text(spec, item)}"
    thr = _threshold(ev, item, "enter", tier)
    if thr is None:
        return head
    rising = item["direction"] == "rising"
    under = "under" if rising else "over"
    bound = item["statistic"] == "bounds"
    word = (", lower bound " if rising else ", upper bound ") + under if bound else f" {under}"
    return f"{head}{word} {_thr_text(ev, item, thr)}"


def _gate_items(ev: Evaluation, r: int, d: int) -> list[dict[str, Any]]:
    out = []
    for g, gate in enumerate(ev.ruleset.gates):
        value = None
        if gate.indicator is not None:
            value = _num(ev.indicators[gate.indicator].estimate[r, d])
        out.append(
            {
                "id": gate.id,
                "passed": bool(ev.gates[g, r, d]),
                "indicator": gate.indicator,
                "op": gate.op,
                "threshold": gate.value,
                "value": value,
                "known": list(gate.known),
                "message": gate.message,
            }
        )
    return out


def _insufficient(ev: Evaluation, date: str, gates: list[dict[str, Any]], unknown: list) -> str:  # type: ignore[type-arg]
    parts = []
    for gi in gates:
        if gi["passed"]:
            continue
        if gi["indicator"] is not None:
            spec = ev.ruleset.indicator(gi["indicator"])
            val = "missing" if gi["value"] is None else value_text(spec, gi["value"])
            need = gi["op"].replace("_", " ")
            parts.append(
                f"{spec.label} {val}, needs {need} {value_text(spec, gi['threshold'])}"
            )
        else:
            parts.append(
                ", ".join(_unknown_text(ev, it) for it in unknown if it["id"] in gi["known"])
                or gi["id"]
            )
    return f"Insufficient data on {date}: {'; '.join(parts)}."


def _ordered(items: list[dict[str, Any]], tier: int) -> list[dict[str, Any]]:
    """Known criteria, those at or above ``tier`` (the ones holding it) first."""
    known = [it for it in items if it["known"]]
    return sorted(known, key=lambda it: (it["level"] < tier or tier == 0, -it["level"]))


def _move(ev: Evaluation, r: int, dd: int, previous: int, new: int) -> tuple[str, str]:
    """(action, criteria text) of the move from ``previous`` to ``new`` decided on day ``dd``."""
    timing = ev.ruleset.timing
    items = [_criterion_item(ev, c, r, dd) for c in range(len(ev.ruleset.criteria))]
    if new > previous:
        drivers = [
            _describe(ev, it, previous, named=new, counter=timing.confirm_days)
            for it in _ordered(items, new)
            if it["level"] >= new
        ]
        others = [
            _short_of(ev, it, new)
            for it in _ordered(items, new)
            if it["level"] < new and it["status"] == "ok"
        ]
        text = "; ".join(drivers) or f"candidate {_tier(ev, new)}"
        return "raised", text + ("; " + "; ".join(others) if others else "")
    below = sorted(
        (it for it in _ordered(items, previous) if it["level"] < previous),
        key=lambda it: it["below_days"],
    )  # the criterion released last decided the day
    released = [
        _describe(ev, it, previous, named=previous, counter=timing.release_days) for it in below
    ]
    text = "; ".join(released) or f"candidate {_tier(ev, new)}"
    if timing.max_steps_down is not None and previous - new == timing.max_steps_down:
        cand = int(ev.candidate[r, dd])
        if cand < new:
            text += (
                f" (at most {timing.max_steps_down} step(s) down at once; "
                f"candidate {_tier(ev, cand)})"
            )
    return "lowered", text


def _held(ev: Evaluation, r: int, d: int, tier: int, items: list[dict[str, Any]]) -> list[str]:
    """What held a change of the decided ``tier`` back on day ``d`` (empty: nothing)."""
    timing = ev.ruleset.timing
    cand = int(ev.candidate[r, d])
    held_by: list[str] = []
    if cand > tier:
        push = [
            _describe(ev, it, tier, named=cand)
            for it in _ordered(items, cand)
            if it["level"] > tier
        ]
        held_by.append(
            f"{int(ev.up[r, d])} of {timing.confirm_days} confirmation days so far for "
            f"{_tier(ev, cand)}"
            + (f" ({'; '.join(push)})" if push else "")
        )
    elif cand < tier:
        since, down = int(ev.since[r, d]), int(ev.down[r, d])
        pull = [
            _describe(ev, it, tier, named=tier)
            for it in _ordered(items, tier)
            if it["level"] < tier
        ]
        detail = f" ({'; '.join(pull)})" if pull else ""
        if down < timing.release_days:
            held_by.append(f"{down} of {timing.release_days} release days so far{detail}")
        elif since < timing.min_days_in_tier:
            held_by.append(
                f"{since} of {timing.min_days_in_tier} minimum days in tier "
                f"({timing.release_days} of {timing.release_days} release days met)"
            )
    low, high = int(ev.candidate_low[r, d]), int(ev.candidate_high[r, d])
    if cand == tier and low < tier <= high:
        held_by += [_unknown_text(ev, it) for it in items if not it["known"]]
    return held_by


def _testing_change(ev: Evaluation, r: int, d: int) -> dict[str, Any] | None:
    """The testing change known on day ``d`` within the policy's ``testing_hold`` days (None:
    none, or no such option)."""
    hold = ev.ruleset.testing_hold
    if hold is None:
        return None
    series = ev.indicators[hold.indicator]
    since = _num(series.estimate[r, d])
    if since is None or not 0 <= since < hold.days:
        return None

    def at(values: Any) -> float | None:
        return None if values is None else _num(values[r, d])

    return {
        "date": str(ev.dates[d] - np.timedelta64(int(since), "D")),
        "days_since": int(since),
        "tests_ratio": at(series.size),
        "tests_ratio_lower": at(series.lower),
        "tests_ratio_upper": at(series.upper),
        "held": bool(ev.testing_held.size and ev.testing_held[r, d]),
    }


def testing_text(change: dict[str, Any]) -> str:
    """"Testing: tests rose 60% from 2031-03-02: part of the rise in cases reflects more
    testing." (or the fall, with less testing)."""
    ratio = change.get("tests_ratio")
    if ratio is None:
        return f"Testing: testing changed from {change['date']}."
    more = ratio >= 1
    return (f"Testing: tests {change_text(ratio)} from {change['date']}: part of the "
            f"{'rise' if more else 'fall'} in cases reflects {'more' if more else 'less'} "
            "testing.")


def _pending(ev: Evaluation, r: int, d: int) -> int | None:
    """Day index of a decided move not yet in force on day ``d`` (None when there is none)."""
    delay = ev.ruleset.timing.effective_delay_days
    for k in range(d, max(d - delay, -1), -1):
        before = int(ev.decided[r, k - 1]) if k > 0 else int(ev.start_tier[r])
        if int(ev.decided[r, k]) != before:
            return k
    return None


def explain(ev: Evaluation, r: int, d: int) -> Explanation:
    """Build the explanation of region index ``r`` on day index ``d``."""
    rs, timing = ev.ruleset, ev.ruleset.timing
    delay = timing.effective_delay_days
    date = str(ev.dates[d])
    decided = int(ev.decided[r, d])
    tier = int(ev.tier[r, d])
    previous = int(ev.tier[r, d - 1]) if d > 0 else int(ev.start_in_force[r])
    cand = int(ev.candidate[r, d])
    items = [_criterion_item(ev, c, r, d) for c in range(len(rs.criteria))]
    gates = _gate_items(ev, r, d)
    signals: list[dict[str, Any]] = [
        {
            "id": s.id,
            "active": bool(ev.prepare[i, r, d]),
            "run": int(ev.prepare_run[i, r, d]),
            "message": signal_message(ev, i, r, d),
        }
        for i, s in enumerate(rs.prepare)
    ]
    unknown = [it for it in items if not it["known"]]
    mentioned_unknown = False
    held_by: list[str] = []
    decided_on: str | None = None
    effective: str | None = None
    if tier == INSUFFICIENT_DATA:
        action = "insufficient"
        sentence = _insufficient(ev, date, gates, unknown)
    elif previous != INSUFFICIENT_DATA and tier != previous:
        dd = d - delay
        decided_on, effective = (str(ev.dates[dd]) if dd >= 0 else None), date
        if dd >= 0:
            action, text = _move(ev, r, dd, previous, tier)
        else:
            action = "raised" if tier > previous else "lowered"
            text = "decided before this period"
        verb = "Raised" if action == "raised" else "Lowered"
        sentence = f"{verb} from {_tier(ev, previous)} to {_tier(ev, tier)} on {date}: {text}"
        if delay and decided_on is not None:
            sentence += f" (decided on {decided_on})"
    elif (k := _pending(ev, r, d)) is not None and int(ev.decided[r, d]) != tier and delay:
        before = int(ev.decided[r, k - 1]) if k > 0 else int(ev.start_tier[r])
        _kind, text = _move(ev, r, k, before, decided)
        decided_on = str(ev.dates[k])
        effective = str(ev.dates[k] + np.timedelta64(delay, "D"))
        action = "decided"
        word = "raise" if decided > tier else "lowering"
        when = "today" if k == d else f"on {decided_on}"
        to = f"{word} to {_tier(ev, decided)}"
        sentence = f"Held at {_tier(ev, tier)}: {to} decided {when}, in force from {effective}"
        sentence += f": {text}"
        held_by.append(f"{to} in force from {effective}")
    else:
        held_by = _held(ev, r, d, decided, items)
        if ev.testing_held.size and ev.testing_held[r, d]:
            hold = rs.testing_hold
            push = [_describe(ev, it, decided, named=decided + 1) for it in items
                    if hold is not None and it["id"] in hold.criteria and it["known"]
                    and it["level"] > decided]
            held_by.insert(0, "held back by testing change"
                           + (f" ({'; '.join(push)})" if push else ""))
        mentioned_unknown = any("data" in h or "nowcast" in h or "incomplete" in h for h in held_by)
        action = "held" if held_by else "unchanged"
        if held_by:
            sentence = f"Held at {_tier(ev, decided)}: " + "; ".join(held_by)
        else:
            shown = [_describe(ev, it, decided, named=decided) for it in _ordered(items, decided)]
            sentence = f"Stays at {_tier(ev, decided)}" + (": " + "; ".join(shown) if shown else "")
    if action != "insufficient":
        sentence += "."
        if unknown and not mentioned_unknown:
            sentence += " Unknown: " + "; ".join(_unknown_text(ev, it) for it in unknown) + "."
        nowcasts = [it for it in items if it["known"] and it["nowcast"]]
        if nowcasts:
            sentence += " Nowcast: " + "; ".join(_nowcast_text(ev, it) for it in nowcasts) + "."
    testing = _testing_change(ev, r, d)
    if testing is not None:
        sentence += " " + testing_text(testing)
    active = [s for s in signals if s["active"]]
    if active:
        sentence += " Prepare: " + " ".join(
            s["message"] or f"signal {s['id']} active." for s in active
        )
    data = {
        "region": ev.regions[r],
        "date": date,
        "ruleset": {"name": rs.name, "version": rs.version, "sha256": rs.sha256},
        "tier": tier,
        "tier_name": rs.tier_name(tier),
        "previous": previous,
        "decided": decided,
        "action": action,
        "decided_on": decided_on,
        "effective_date": effective,
        "candidate": cand,
        "candidate_low": int(ev.candidate_low[r, d]),
        "candidate_high": int(ev.candidate_high[r, d]),
        "counters": {
            "up": int(ev.up[r, d]),
            "confirm_days": timing.confirm_days,
            "down": int(ev.down[r, d]),
            "release_days": timing.release_days,
            "since_change": int(ev.since[r, d]),
            "min_days_in_tier": timing.min_days_in_tier,
        },
        "criteria": items,
        "gates": gates,
        "prepare": signals,
        "held_by": held_by,
        "testing_change": testing,
        "sentence": sentence,
    }
    return Explanation(data=data, sentence=sentence)
