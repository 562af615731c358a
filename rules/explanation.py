"""Explanations of one region and day, built on demand from an :class:`Evaluation`.

An :class:`Explanation` has a JSON-ready ``data`` dict (which criteria, values and bounds,
thresholds, counters, gates, signals, and what held a change back) and a plain ``sentence``, e.g.
"Raised from 1 to 2 on 2031-05-14: 7-day incidence 162 (148–177) per 100 000 over the enter
threshold 150 for 3 of 3 days; positivity 8.1% under 10%."
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from rules.levels import (
    REASON_MISSING,
    REASON_NOWCAST,
    REASON_SMALL_COUNT,
    REASON_STALE,
    RegionThresholds,
)
from rules.model import Criterion, IndicatorSpec
from rules.ruleset import INSUFFICIENT_DATA

if TYPE_CHECKING:
    from rules.evaluation import Evaluation

__all__ = ["Explanation", "explain"]

_REASONS = {
    0: "ok",
    REASON_MISSING: "missing",
    REASON_STALE: "stale",
    REASON_NOWCAST: "nowcast excluded",
    REASON_SMALL_COUNT: "count below minimum",
}


@dataclass(frozen=True, kw_only=True)
class Explanation:
    """Why a region has its tier on a day: structured ``data`` (JSON-ready) and a ``sentence``."""

    data: dict[str, Any]
    sentence: str


def _num(x: float) -> float | None:
    return None if x is None or not math.isfinite(float(x)) else float(x)


def _fmt(spec: IndicatorSpec, value: float | None) -> str:
    if value is None:
        return "n/a"
    return f"{value:.{spec.decimals}f}"


def _unit(spec: IndicatorSpec, text: str) -> str:
    if not spec.unit:
        return text
    return text + spec.unit if spec.unit.startswith("%") else f"{text} {spec.unit}"


def _value_text(spec: IndicatorSpec, item: dict[str, Any], statistic: str) -> str:
    text = _fmt(spec, item["value"])
    if statistic == "bounds" and item["lower"] is not None and item["upper"] is not None:
        text += f" ({_fmt(spec, item['lower'])}–{_fmt(spec, item['upper'])})"
    return _unit(spec, text)


def _criterion_item(ev: Evaluation, c: int, r: int, d: int) -> dict[str, Any]:
    crit: Criterion = ev.ruleset.criteria[c]
    series = ev.indicators[crit.indicator]
    lv = ev.criterion_levels
    th: RegionThresholds = lv.thresholds[c]
    conditioned = None
    for j, (src, lvl, tgt) in enumerate(
        zip(lv.cond_source, lv.cond_level, lv.cond_target, strict=True)
    ):
        if tgt == c and ev.levels[src, r, d] >= lvl:
            th, conditioned = lv.cond_thresholds[j], ev.ruleset.criteria[src].id
    age = None if series.age_days is None else _num(series.age_days[r, d])
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
        "known": bool(ev.known[c, r, d]),
        "status": _REASONS[int(ev.reason[c, r, d])],
        "enter": [_num(v) for v in th.enter[:, r]],
        "exit": [_num(v) for v in th.exit[:, r]],
        "min_count": _num(th.min_count[r]),
        "conditioned_by": conditioned,
    }


def _unknown_text(ev: Evaluation, item: dict[str, Any]) -> str:
    label = ev.ruleset.indicator(item["indicator"]).label
    if item["status"] == "stale" and item["age_days"] is not None:
        return f"{label} data {item['age_days']:g} days old"
    if item["status"] == "nowcast excluded":
        return f"{label} is a nowcast"
    return f"{label} data {item['status']}"


def _against(ev: Evaluation, item: dict[str, Any], tier: int, kind: str) -> str:
    """'<label> <value> over/under [the <kind> threshold] <t>' for tier ``tier``."""
    spec = ev.ruleset.indicator(item["indicator"])
    value = _value_text(spec, item, item["statistic"])
    thr = item[kind][tier - 1] if 1 <= tier <= len(item[kind]) else None
    if thr is None:
        return f"{item['label']} {value}"
    met = item["level"] >= tier
    rising = item["direction"] == "rising"
    word = ("over" if met else "under") if rising else ("under" if met else "over")
    if item["statistic"] == "bounds" and kind == "enter" and not met:
        word = ("lower bound " if rising else "upper bound ") + word
    name = f"the {kind} threshold " if kind == "exit" or met else ""
    thr_text = f"{thr:g}" + ("%" if spec.unit.startswith("%") else "")
    return f"{item['label']} {value} {word} {name}{thr_text}"


def explain(ev: Evaluation, r: int, d: int) -> Explanation:
    """Build the explanation of region index ``r`` on day index ``d``."""
    rs, timing = ev.ruleset, ev.ruleset.timing
    date = str(ev.dates[d])
    decided = int(ev.decided[r, d])
    previous = int(ev.decided[r, d - 1]) if d > 0 else int(ev.start_tier[r])
    tier = int(ev.tier[r, d])
    cand = int(ev.candidate[r, d])
    items = [_criterion_item(ev, c, r, d) for c in range(len(rs.criteria))]
    gates: list[dict[str, Any]] = []
    for g, gate in enumerate(rs.gates):
        value = None
        if gate.indicator is not None:
            value = _num(ev.indicators[gate.indicator].estimate[r, d])
        gates.append(
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
    signals: list[dict[str, Any]] = [
        {
            "id": s.id,
            "active": bool(ev.prepare[i, r, d]),
            "run": int(ev.prepare_run[i, r, d]),
            "message": s.message,
        }
        for i, s in enumerate(rs.prepare)
    ]
    unknown = [it for it in items if not it["known"]]
    effective = None
    if decided != previous:
        effective = str(ev.dates[d] + np.timedelta64(timing.effective_delay_days, "D"))
    held_by: list[str] = []
    if tier == INSUFFICIENT_DATA:
        action = "insufficient"
        parts = []
        for gi in gates:
            if gi["passed"]:
                continue
            if gi["indicator"] is not None:
                spec = rs.indicator(gi["indicator"])
                val = "missing" if gi["value"] is None else _unit(spec, _fmt(spec, gi["value"]))
                need = gi["op"].replace("_", " ")
                parts.append(
                    f"{spec.label} {val}, needs {need} {_unit(spec, _fmt(spec, gi['threshold']))}"
                )
            else:
                parts.append(
                    ", ".join(_unknown_text(ev, it) for it in unknown if it["id"] in gi["known"])
                    or gi["id"]
                )
        sentence = f"Insufficient data on {date}: {'; '.join(parts)}."
    elif decided > previous:
        action = "raised"
        drivers = [
            _against(ev, it, decided, "enter")
            for it in items
            if it["known"] and it["level"] >= decided
        ]
        others = [
            _against(ev, it, decided, "enter")
            for it in items
            if it["known"] and it["level"] < decided and it["status"] == "ok"
        ]
        n = timing.confirm_days
        sentence = (
            f"Raised from {previous} to {decided} on {date}: "
            f"{', '.join(drivers) or f'candidate {decided}'} for {n} of {n} days"
        )
        sentence += "; " + "; ".join(others) if others else ""
    elif decided < previous:
        action = "lowered"
        released = [
            _against(ev, it, previous, "exit")
            for it in items
            if it["known"] and it["level"] < previous
        ]
        n = timing.release_days
        sentence = (
            f"Lowered from {previous} to {decided} on {date}: "
            f"{', '.join(released) or f'candidate {cand}'} for {n} of {n} days"
        )
    else:
        action = "held" if cand != decided or int(ev.candidate_low[r, d]) < decided else "unchanged"
        if cand > decided:
            held_by.append(
                f"candidate {cand} for {int(ev.up[r, d])} of {timing.confirm_days} "
                "confirmation days"
            )
        elif cand < decided:
            since = int(ev.since[r, d])
            if int(ev.down[r, d]) < timing.release_days:
                held_by.append(f"{int(ev.down[r, d])} of {timing.release_days} release days so far")
            elif since < timing.min_days_in_tier:
                held_by.append(f"{since} of {timing.min_days_in_tier} minimum days in tier")
        if (
            int(ev.candidate_low[r, d]) < decided <= int(ev.candidate_high[r, d])
            and cand == decided
        ):
            held_by += [_unknown_text(ev, it) for it in unknown]
        if held_by:
            sentence = f"Held at {decided}: " + "; ".join(held_by)
        else:
            shown = [
                _against(ev, it, min(decided + 1, rs.top_tier), "enter")
                for it in items
                if it["known"]
            ]
            sentence = f"Stays at {decided}" + (": " + "; ".join(shown) if shown else "")
    if action != "insufficient":
        if effective is not None and timing.effective_delay_days:
            sentence += f" (in force from {effective})"
        sentence += "."
        if action in ("raised", "lowered") and unknown:
            sentence += " Unknown: " + "; ".join(_unknown_text(ev, it) for it in unknown) + "."
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
        "decided": decided,
        "previous": previous,
        "action": action,
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
        "sentence": sentence,
    }
    return Explanation(data=data, sentence=sentence)
