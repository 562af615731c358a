"""The public outlook: what would move a published tier, worked by hand from the demo policy.

The rules checked are the engine's own tier semantics (docs/rules.md): release needs every
criterion under its exit threshold for ``release_days`` days and ``min_days_in_tier`` days in the
tier; escalation needs a criterion over the next enter threshold; ``statistic: bounds`` releases
on the upper bound and escalates on the lower one. The policy is rules/policies/county.yaml
(invented): release_days 28, min_days_in_tier 21, confirm_days 5, effective_delay_days 1.
"""

from __future__ import annotations

from datetime import UTC, date, datetime
from pathlib import Path

import pytest

from rules import load_ruleset
from rules.record import ExplanationRecord, read_explanation
from server.readmodels.outlook import APPROACHING_SHARE, outlook_from
from server.services.review import OfficialTier

POLICY = load_ruleset(Path(__file__).parents[3] / "rules" / "policies" / "county.yaml")


def _item(cid: str, indicator: str, value: float, *, lower: float | None = None,
          upper: float | None = None, statistic: str = "estimate", known: bool = True,
          status: str = "ok") -> dict:
    crit = POLICY.criterion(cid)
    return {
        "id": cid, "indicator": indicator, "label": POLICY.indicator(indicator).label,
        "direction": "rising", "statistic": statistic, "value": value, "lower": lower,
        "upper": upper, "known": known, "status": status,
        "enter": list(crit.thresholds.enter), "exit": list(crit.thresholds.exit),
    }


def _official(tier: int, since: date) -> OfficialTier:
    return OfficialTier(region="D99", name="Invented", tier=tier, tier_name="", public_text="",
                        since=since, published_at=datetime(2026, 1, 1, tzinfo=UTC))


def _explanation(items: list[dict], *, decided: int, down: int = 0, day: str = "2026-03-10"
                 ) -> ExplanationRecord:
    """The record the engine stores (rules.record), read back from its stored shape."""
    return read_explanation({"data": {"date": day, "decided": decided, "criteria": items,
                                      "counters": {"down": down, "release_days": 28}}},
                            tier=decided)


def test_outlook_step_down_compares_upper_bound_with_exit_threshold() -> None:
    # Tier 2 (High): incidence exit for tier 2 is 110, positivity 7, admissions 8 (county.yaml).
    items = [
        _item("incidence", "incidence_7d", 90, lower=80, upper=105, statistic="bounds"),
        _item("positivity", "positivity_7d", 7.5),
        _item("admissions", "admissions_7d", 5.0, lower=3.0, upper=7.9, statistic="bounds"),
    ]
    o = outlook_from(ruleset=POLICY, record=_explanation(items, decided=2),
                     official=_official(2, date(2026, 2, 1)), lang=None)
    assert o.down is not None
    checks = {c.criterion: c for c in o.down.figures}
    assert checks["incidence"].uses_bound == "upper"
    assert checks["incidence"].threshold_text == "110 per 100\u202f000"
    assert checks["incidence"].met is True          # 105 < 110
    assert checks["positivity"].met is False        # 7.5 >= 7
    assert checks["admissions"].met is True         # 7.9 < 8
    assert o.down.to_tier == 1 and o.down.rule == "all"


def test_outlook_earliest_step_down_waits_for_release_and_minimum_days() -> None:
    # Not every figure is under its exit threshold: the whole release period is still ahead.
    # As of 2026-03-10 + 28 days = 2026-04-07, + 1 day until it takes effect = 2026-04-08.
    items = [_item("positivity", "positivity_7d", 7.5)]
    o = outlook_from(ruleset=POLICY, record=_explanation(items, decided=2, down=5),
                     official=_official(2, date(2026, 3, 1)), lang=None)
    assert o.down is not None
    assert o.down.days_met_so_far == 0
    assert o.down.earliest == date(2026, 4, 8)


def test_outlook_earliest_step_down_counts_days_already_under() -> None:
    # Every figure under its exit threshold for 20 of 28 days: 8 days to go from 2026-03-10,
    # then 1 day until in force -> 2026-03-19; the tier started 2026-01-01, so 21 days are met.
    items = [_item("positivity", "positivity_7d", 5.0)]
    o = outlook_from(ruleset=POLICY, record=_explanation(items, decided=2, down=20),
                     official=_official(2, date(2026, 1, 1)), lang=None)
    assert o.down is not None
    assert o.down.days_met_so_far == 20
    assert o.down.earliest == date(2026, 3, 19)


def test_outlook_minimum_days_in_tier_can_be_the_later_limit() -> None:
    # Tier started 2026-03-09: minimum 21 days -> 2026-03-30, +1 day in force -> 2026-03-31,
    # later than 2026-03-10 + (28 - 27) + 1 = 2026-03-12.
    items = [_item("positivity", "positivity_7d", 5.0)]
    o = outlook_from(ruleset=POLICY, record=_explanation(items, decided=2, down=27),
                     official=_official(2, date(2026, 3, 9)), lang=None)
    assert o.down is not None and o.down.earliest == date(2026, 3, 31)


def test_outlook_release_counter_ignored_when_engine_tier_differs_from_published() -> None:
    items = [_item("positivity", "positivity_7d", 5.0)]
    o = outlook_from(ruleset=POLICY, record=_explanation(items, decided=3, down=20),
                     official=_official(2, date(2026, 1, 1)), lang=None)
    assert o.down is not None and o.down.days_met_so_far == 0


def test_outlook_step_up_marks_approaching_figures() -> None:
    # Tier 1 -> 2: positivity enter for tier 2 is 10; 8.5 >= 0.8 * 10 is approaching,
    # incidence lower bound 100 < 0.8 * 150 = 120 is not.
    items = [
        _item("positivity", "positivity_7d", 8.5),
        _item("incidence", "incidence_7d", 118, lower=100, upper=130, statistic="bounds"),
    ]
    o = outlook_from(ruleset=POLICY, record=_explanation(items, decided=1),
                     official=_official(1, date(2026, 1, 1)), lang=None)
    assert o.up is not None and o.up.to_tier == 2 and o.up.confirm_days == 5
    checks = {c.criterion: c for c in o.up.figures}
    assert APPROACHING_SHARE == 0.8
    assert checks["positivity"].approaching and checks["positivity"].met is False
    assert checks["incidence"].uses_bound == "lower"
    assert not checks["incidence"].approaching


def test_outlook_leading_null_threshold_uses_first_reachable_tier() -> None:
    # ICU share has no tier-1 threshold (enter [null, 30, 45]); from tier 0 a step up through
    # ICU share alone needs 30 %, the High (2) threshold.
    items = [_item("icu", "icu_share", 12.0)]
    o = outlook_from(ruleset=POLICY, record=_explanation(items, decided=0),
                     official=_official(0, date(2026, 1, 1)), lang=None)
    assert o.down is None
    assert o.up is not None
    assert [c.threshold_text for c in o.up.figures] == ["30.0%"]
    assert [h.tier for h in o.hospital] == [2]


def test_outlook_top_tier_has_no_step_up_and_unknown_figures_are_not_judged() -> None:
    items = [_item("positivity", "positivity_7d", float("nan"), known=False)]
    o = outlook_from(ruleset=POLICY, record=_explanation(items, decided=3),
                     official=_official(3, date(2026, 1, 1)), lang=None)
    assert o.up is None
    assert o.down is not None and o.down.figures[0].met is None


@pytest.mark.parametrize(("lang", "name"), [(None, "Heightened"), ("de", "Erhöht")],
                         ids=["en", "de"])
def test_outlook_names_tiers_in_the_page_language(lang: str | None, name: str) -> None:
    items = [_item("positivity", "positivity_7d", 5.0)]
    o = outlook_from(ruleset=POLICY, record=_explanation(items, decided=2),
                     official=_official(2, date(2026, 1, 1)), lang=lang)
    assert o.down is not None and o.down.to_name == name
