"""Read model: what would move a district's published tier, in words residents can follow.

The public district page says which figures would have to stay under which values, for how many
days, before the health authority could step the tier down, and the earliest date that could
happen; and, for a step up, which figures are approaching the next tier's thresholds. Both come
from the published policy (the active ruleset: thresholds, confirmation and release periods,
minimum time in a tier) and the newest assessment of the district (its figures as computed this
morning). Nothing staff-only is exposed: not the recommended tier, not pending reviews. The tier
that counts is the *published* one; the policy describes what the authority considers, and the
page says that the authority decides.

The rules mirror the engine's (``docs/rules.md``): a tier is held while a criterion stays at or
above its *exit* threshold (the hysteresis band); a step down needs every criterion under its exit
threshold for ``release_days`` days in a row and at least ``min_days_in_tier`` days in the tier; a
step up needs a criterion over the next tier's *enter* threshold for ``confirm_days`` days. With
``statistic: bounds`` the engine releases on the interval's upper bound and escalates on its lower
bound, so the page compares those. A decision takes effect ``effective_delay_days`` later.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date, timedelta
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import Ruleset
from rules.record import CriterionState, ExplanationRecord, read_explanation
from server.services.assessments import current_assessment_id
from server.services.review_official import OfficialTier
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_ruleset
from server.store.models import Assessment, Region

__all__ = [
    "APPROACHING_SHARE",
    "HOSPITAL_INDICATORS",
    "FigureCheck",
    "HospitalFigure",
    "Outlook",
    "StepDown",
    "StepUp",
    "district_outlook",
    "outlook_from",
]

#: A figure at or above this share of the next tier's enter threshold is "approaching" it.
#: Common practice for early-warning wording, no source.
APPROACHING_SHARE = 0.8

#: Indicators that describe pressure on hospitals, shown in their own paragraph.
HOSPITAL_INDICATORS = frozenset({"admissions_7d", "icu_share"})


@dataclass(frozen=True, kw_only=True)
class FigureCheck:
    """One figure of the policy against one threshold.

    ``value_text`` is the figure the comparison uses (the interval bound with ``bounds``);
    ``met`` says whether the condition of the step (under the exit threshold for a step down,
    over the enter threshold for a step up) holds today; None when the figure is not known.
    """

    criterion: str
    label: str
    value_text: str
    threshold_text: str
    uses_bound: str | None  # "upper" / "lower" when the comparison uses an interval bound
    met: bool | None
    approaching: bool
    inactive_reason: str | None  # e.g. too few cases to count


@dataclass(frozen=True, kw_only=True)
class StepDown:
    to_tier: int
    to_name: str
    figures: tuple[FigureCheck, ...]
    rule: str  # "all" (every figure) or "fewer:m" (fewer than m figures may stay at the tier)
    release_days: int
    min_days_in_tier: int
    days_met_so_far: int
    earliest: date


@dataclass(frozen=True, kw_only=True)
class StepUp:
    to_tier: int
    to_name: str
    figures: tuple[FigureCheck, ...]
    rule: str  # "any" or "at_least:m"
    confirm_days: int


@dataclass(frozen=True, kw_only=True)
class HospitalFigure:
    """A hospital figure the policy uses, against the threshold of the tier above (or the top)."""

    check: FigureCheck
    tier: int
    tier_name: str


@dataclass(frozen=True, kw_only=True)
class Outlook:
    """What would change the published tier of one district."""

    tier: int
    tier_name: str
    as_of: date
    down: StepDown | None
    up: StepUp | None
    hospital: tuple[HospitalFigure, ...]
    effective_delay_days: int
    combined_by_score: bool


def _num(x: Any) -> float | None:
    if x is None:
        return None
    v = float(x)
    return v if math.isfinite(v) else None


def _first(values: Sequence[float | None], start: int) -> float | None:
    """The first non-null threshold at tier index >= ``start`` (leading nulls jump tiers)."""
    for v in values[start:]:
        if v is not None:
            return float(v)
    return None


_DIGIT_SPACE = re.compile(r"(?<=\d) (?=\d)")


def _text(ruleset: Ruleset, indicator: str, value: float | None) -> str:
    """The value as the policy formats it; spaces inside numbers ("100 000") do not break."""
    if value is None:
        return "—"
    try:
        text = ruleset.indicator(indicator).format(value)
    except KeyError:
        text = f"{value:g}"
    return _DIGIT_SPACE.sub("\u202f", text)


def _check(
    ruleset: Ruleset, item: CriterionState, threshold: float, *, release: bool,
    point: bool = False,
) -> FigureCheck:
    """Compare a criterion's figure with ``threshold`` as the engine does (``point``: compare
    the estimate itself, for plain descriptions)."""
    rising = item.direction == "rising"
    bounds = item.statistic == "bounds" and not point
    # Release compares the bound on the far side (upper when rising), escalation the near one.
    side = None
    value = _num(item.value)
    if bounds:
        side = "upper" if release == rising else "lower"
        bound = _num(item.upper if side == "upper" else item.lower)
        value = bound if bound is not None else value
    known = item.known and value is not None
    inactive = "count below minimum" if item.status == "count below minimum" else None
    met: bool | None = None
    approaching = False
    if known and value is not None:
        below = value < threshold if rising else value > threshold
        met = below if release else not below
        if not release and not met:
            approaching = (value >= APPROACHING_SHARE * threshold if rising
                           else value <= threshold / APPROACHING_SHARE)
    return FigureCheck(
        criterion=item.id, label=item.label,
        value_text=_text(ruleset, item.indicator, value),
        threshold_text=_text(ruleset, item.indicator, threshold),
        uses_bound=side, met=None if inactive else met, approaching=approaching,
        inactive_reason=inactive,
    )


def outlook_from(
    *, ruleset: Ruleset, record: ExplanationRecord, official: OfficialTier, lang: str | None,
) -> Outlook:
    """Build the outlook from the newest assessment's record (its criteria, counters, day and
    decided tier, :mod:`rules.record`)."""
    timing = ruleset.timing
    k = official.tier
    as_of = record.day
    items = record.criteria
    method = ruleset.combination.method
    m = ruleset.combination.m or 1
    tiers = {t.level: t for t in ruleset.tiers}

    def name(level: int) -> str:
        t = tiers.get(level)
        return t.name_in(lang) if t is not None else str(level)

    down = None
    if 0 < k <= ruleset.top_tier:
        checks = []
        for it in items:
            thr = _first(it.exit, k - 1)
            reach = any(v is not None for v in it.enter[k - 1:])
            if thr is not None and reach:
                checks.append(_check(ruleset, it, thr, release=True))
        # The engine's release counter belongs to its own tier; it counts for the published one
        # only when both agree.
        so_far = record.counters.down if record.decided == k else 0
        so_far = min(so_far, timing.release_days)
        all_met = bool(checks) and all(c.met for c in checks if c.inactive_reason is None)
        wait = timing.release_days - (so_far if all_met else 0)
        earliest = max(as_of + timedelta(days=max(wait, 1)),
                       official.since + timedelta(days=timing.min_days_in_tier))
        earliest += timedelta(days=timing.effective_delay_days)
        down = StepDown(
            to_tier=k - 1, to_name=name(k - 1), figures=tuple(checks),
            rule="all" if method != "at_least" else f"fewer:{m}",
            release_days=timing.release_days, min_days_in_tier=timing.min_days_in_tier,
            days_met_so_far=so_far if all_met else 0, earliest=earliest,
        )
    up = None
    if 0 <= k < ruleset.top_tier:
        checks = []
        for it in items:
            thr = _first(it.enter, k)
            if thr is not None:
                checks.append(_check(ruleset, it, thr, release=False))
        up = StepUp(to_tier=k + 1, to_name=name(k + 1), figures=tuple(checks),
                    rule="any" if method != "at_least" else f"at_least:{m}",
                    confirm_days=timing.confirm_days)
    hospital = []
    level = min(k + 1, ruleset.top_tier)
    for it in items:
        if it.indicator in HOSPITAL_INDICATORS:
            enter = it.enter
            thr = _first(enter, level - 1)
            if thr is not None:
                at = next(j for j in range(level - 1, len(enter)) if enter[j] is not None) + 1
                hospital.append(HospitalFigure(check=_check(ruleset, it, thr, release=False,
                                                                  point=True),
                                               tier=at, tier_name=name(at)))
    return Outlook(
        tier=k, tier_name=name(k), as_of=as_of, down=down, up=up, hospital=tuple(hospital),
        effective_delay_days=timing.effective_delay_days,
        combined_by_score=method == "score",
    )


def district_outlook(
    *, session: Session, code: str, official: OfficialTier | None, lang: str | None = None,
) -> Outlook | None:
    """The outlook of a district with a published tier (None: nothing published or assessed)."""
    if official is None:
        return None
    row = active_ruleset(session=session)
    region_id = session.scalar(select(Region.id).where(Region.code == code))
    if row is None or region_id is None:
        return None
    ruleset = parsed(row)
    if official.tier > ruleset.top_tier:
        return None  # published under a policy with more tiers; the new one has not decided yet
    assessment_id = current_assessment_id(session=session, region_id=region_id)
    if assessment_id is None:
        return None
    explanation = session.scalar(
        select(Assessment.explanation).where(Assessment.id == assessment_id)
    )
    data = (explanation or {}).get("data")
    if not isinstance(data, dict) or "criteria" not in data:
        return None  # rows of the first releases carry no criteria to reason from
    record = read_explanation(explanation or {})
    return outlook_from(ruleset=ruleset, record=record, official=official, lang=lang)
