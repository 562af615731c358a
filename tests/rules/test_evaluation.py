"""Evaluator behaviours: unknown data, gates, small counts, overrides, conditions, timing."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rules import (
    INSUFFICIENT_DATA,
    EvaluationInputError,
    IndicatorSeries,
    evaluate,
    load_ruleset,
    parse_ruleset,
)

POLICIES = Path(__file__).resolve().parents[2] / "rules" / "policies"

RULES = """\
name: behaviour
version: "1"
tiers:
  - {name: Calm, staff: s, public: p}
  - {name: Busy, staff: s, public: p}
  - {name: Hectic, staff: s, public: p}
indicators:
  incidence_7d: {label: 7-day incidence, unit: per 100 000, decimals: 0, max_age_days: 3}
  ww_level: {label: wastewater, decimals: 1, max_age_days: 3}
criteria:
  - {id: incidence, indicator: incidence_7d, enter: [50, 150], exit: [40, 120]}
  - {id: wastewater, indicator: ww_level, enter: [2, 4], exit: [1, 3]}
timing: {confirm_days: CONFIRM, release_days: RELEASE, min_days_in_tier: MIN, MAXSTEPS}
"""


def _rules(confirm: int = 1, release: int = 1, min_days: int = 0, steps: str = "") -> str:
    return (
        RULES.replace("CONFIRM", str(confirm))
        .replace("RELEASE", str(release))
        .replace("MIN", str(min_days))
        .replace(", MAXSTEPS", f", max_steps_down: {steps}" if steps else "")
    )


def _dates(n: int) -> np.ndarray:
    return np.arange(n) + np.datetime64("2031-03-10")


def _run(text: str, inc: list[float], ww: list[float], **extra: object):  # type: ignore[no-untyped-def]
    rs = parse_ruleset(text)
    ind = {
        "incidence_7d": IndicatorSeries(estimate=np.array([inc], dtype=float)),
        "ww_level": IndicatorSeries(estimate=np.array([ww], dtype=float), **extra),  # type: ignore[arg-type]
    }
    return evaluate(rs, ind, regions=["r"], dates=_dates(len(inc)))


def test_evaluate_hysteresis_band_keeps_tier_until_exit() -> None:
    # band 120..150 keeps tier 2; 119 releases (DESIGN.md tier semantics)
    ev = _run(_rules(), [160, 130, 121, 119, 60], [0] * 5)
    assert_array_equal(ev.tier[0], [2, 2, 2, 1, 1])


def test_evaluate_band_does_not_raise_from_below() -> None:
    ev = _run(_rules(), [130, 130, 45], [0] * 3)
    assert_array_equal(ev.tier[0], [1, 1, 1])  # 130 < 150 enters tier 1 only; 45 keeps 1 (exit 40)


def test_evaluate_missing_criterion_never_lowers() -> None:
    ev = _run(_rules(), [160, 10, 10, 10], [0, np.nan, np.nan, 0])
    assert_array_equal(ev.tier[0], [2, 2, 2, 0])
    assert "wastewater data missing" in ev.explain(0, 1).sentence


def test_evaluate_stale_criterion_never_raises() -> None:
    age = np.array([[0, 5, 5]], dtype=float)
    ev = _run(_rules(), [10, 10, 10], [0, 5, 5], age_days=age)
    assert_array_equal(ev.tier[0], [0, 0, 0])


def test_evaluate_stale_explanation_names_age() -> None:
    age = np.array([[0, 5]], dtype=float)
    ev = _run(_rules(), [160, 10], [0, 0], age_days=age)
    assert ev.explain(0, 1).sentence == "Held at Hectic (2): wastewater data 5 days old."


def test_evaluate_confirmation_days_before_rise() -> None:
    ev = _run(_rules(confirm=3), [60, 60, 60, 60], [0] * 4)
    assert_array_equal(ev.tier[0], [0, 0, 1, 1])
    assert ev.explain(0, 1).sentence.startswith(
        "Held at Calm (0): 2 of 3 confirmation days so far for Busy (1) (7-day incidence 60"
    )


def test_evaluate_release_days_and_explanation() -> None:
    ev = _run(_rules(release=3), [60, 10, 10, 10], [0] * 4)
    assert_array_equal(ev.tier[0], [1, 1, 1, 0])
    assert ev.explain(0, 2).sentence == (
        "Held at Busy (1): 2 of 3 release days so far (7-day incidence 10 per 100 000 under the "
        "exit threshold 40 for 2 days; wastewater 0.0 under the exit threshold 1 for 2 days)."
    )


def test_evaluate_minimum_days_in_tier() -> None:
    ev = _run(_rules(min_days=3), [60, 10, 10, 10, 10], [0] * 5)
    assert_array_equal(ev.tier[0], [1, 1, 1, 0, 0])


def test_evaluate_max_steps_down() -> None:
    ev = _run(_rules(steps="1"), [200, 10, 10], [0] * 3)
    assert_array_equal(ev.tier[0], [2, 1, 0])
    # day 1: candidate 0 (10 < exit 40), one step down at most: Hectic (2) -> Busy (1)
    assert ev.explain(0, 1).sentence.endswith(
        "(at most 1 step(s) down at once; candidate Calm (0))."
    )


def test_evaluate_rise_goes_to_sustained_level() -> None:
    # candidate 1, 2, 2 with confirm 3: the level sustained for 3 days is 1
    ev = _run(_rules(confirm=3), [60, 200, 200, 200, 200], [0] * 5)
    assert_array_equal(ev.tier[0], [0, 0, 1, 1, 1])


def test_evaluate_raised_sentence_names_values_and_thresholds() -> None:
    ev = _run(_rules(), [162, 162], [1.5, 1.5])
    assert ev.explain(0, 0).sentence == (
        "Raised from Calm (0) to Hectic (2) on 2031-03-10: 7-day incidence 162 per 100 000 over "
        "the enter threshold 150 for 1 of 1 days; wastewater 1.5 under 4."
    )


def test_evaluate_explanation_is_json_ready() -> None:
    ev = _run(_rules(), [162, np.nan], [1.5, 1.5])
    data = ev.explain(0, 1).data
    assert json.loads(json.dumps(data))["criteria"][0]["status"] == "missing"


def test_evaluate_state_continues_exactly() -> None:
    rs = parse_ruleset(_rules(confirm=2, release=3))
    rng = np.random.default_rng(7)
    inc, ww = rng.uniform(0, 200, (5, 40)), rng.uniform(0, 5, (5, 40))
    ind = {"incidence_7d": IndicatorSeries(estimate=inc), "ww_level": IndicatorSeries(estimate=ww)}
    whole = evaluate(rs, ind, regions=list("abcde"), dates=_dates(40))
    first = evaluate(
        rs,
        {k: IndicatorSeries(estimate=v.estimate[:, :25]) for k, v in ind.items()},
        regions=list("abcde"),
        dates=_dates(25),
    )
    second = evaluate(
        rs,
        {k: IndicatorSeries(estimate=v.estimate[:, 25:]) for k, v in ind.items()},
        regions=list("abcde"),
        dates=_dates(40)[25:],
        start_state=first.final_state,
    )
    assert_array_equal(np.concatenate([first.tier, second.tier], axis=1), whole.tier)


def test_evaluate_missing_indicator_is_named() -> None:
    rs = parse_ruleset(_rules())
    with pytest.raises(EvaluationInputError, match="indicators: missing indicator 'ww_level'"):
        evaluate(
            rs,
            {"incidence_7d": IndicatorSeries(estimate=np.zeros((1, 2)))},
            regions=["r"],
            dates=_dates(2),
        )


def test_evaluate_shape_mismatch_is_named() -> None:
    rs = parse_ruleset(_rules())
    ind = {
        "incidence_7d": IndicatorSeries(estimate=np.zeros((2, 3))),
        "ww_level": IndicatorSeries(estimate=np.zeros((2, 3))),
    }
    with pytest.raises(EvaluationInputError, match=r"indicators\['incidence_7d'\]: shape"):
        evaluate(rs, ind, regions=["r"], dates=_dates(3))


# --- the demo county policy ---------------------------------------------------------------------


def _county(
    inc: np.ndarray,
    *,
    tests: float = 400.0,
    count: np.ndarray | None = None,
    levels: list[str] | None = None,
    adm: np.ndarray | None = None,
    rt_low: float = 0.8,
):  # type: ignore[no-untyped-def]
    rs = load_ruleset(POLICIES / "county.yaml")
    r, d = inc.shape
    z = np.zeros((r, d))

    def s(x: np.ndarray, **kw: object) -> IndicatorSeries:
        return IndicatorSeries(estimate=x, lower=x * 0.9, upper=x * 1.1, **kw)  # type: ignore[arg-type]

    ind = {
        "incidence_7d": s(inc, count=inc * 10 if count is None else count),
        "positivity_7d": s(z + 1),
        "tests_7d": s(z + tests),
        "admissions_7d": s(z if adm is None else adm, count=z + 50),
        "icu_share": s(z + 1),
        "ww_trend": s(z),
        "rt": IndicatorSeries(estimate=z + 1, lower=z + rt_low, upper=z + 2),
        "gp_aberration": s(z),
        "icu_days_to_share": s(z + 22),  # 22: 85 % of ICU beds not within the 21 days projected
        "testing_change": IndicatorSeries(estimate=z + np.nan),  # no testing change known
    }
    return evaluate(
        rs, ind, regions=[f"d{i}" for i in range(r)], dates=_dates(d), region_levels=levels
    )


def test_county_gate_gives_insufficient_data() -> None:
    ev = _county(np.full((1, 3), 60.0), tests=100.0)
    assert_array_equal(ev.tier[0], [INSUFFICIENT_DATA] * 3)
    assert ev.explain(0, 0).sentence.startswith("Insufficient data on 2031-03-10: tests 100")


def test_county_small_count_disables_incidence() -> None:
    # 100 (90-110) would enter tier 1 (lower bound >= 75); 12 cases < min_count 20 disable it
    ev = _county(np.full((2, 7), 100.0), count=np.array([[12.0] * 7, [40.0] * 7]))
    assert_array_equal(ev.tier[:, -1], [0, 1])


def test_county_small_district_override() -> None:
    # 90 (81-99) enters tier 1 in a district (lower bound >= 75) but not in a small one (100);
    # confirmation 5 days, in force the day after
    ev = _county(np.full((2, 6), 90.0), levels=["district", "small_district"])
    assert_array_equal(ev.tier[:, -1], [1, 0])


def test_county_high_incidence_lowers_admission_thresholds() -> None:
    # admissions 11.5 (10.35-12.65): tier 1 normally (lower bound under the tier-2 enter 12);
    # with incidence at level 2 (200, lower bound 180 >= 150) the tier-2 threshold is 10 -> 2
    inc = np.full((2, 8), 200.0)
    inc[1] = 60.0
    ev = _county(inc, adm=np.full((2, 8), 11.5))
    assert_array_equal(ev.levels[2, :, -1], [2, 1])


def test_county_rt_signal_fires_before_tier_moves() -> None:
    ev = _county(np.full((1, 8), 10.0), rt_low=1.05)
    assert_array_equal(ev.prepare[1, 0], [False] * 4 + [True] * 4)
    assert_array_equal(ev.tier[0], [0] * 8)
    assert "Prepare: The lower bound of Rt" in ev.explain(0, 5).sentence
