"""Shipped policies against the published frameworks' thresholds, day by day.

Sources are listed in /work/shared/REFERENCES.md; each case names its source beside it.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rules import INSUFFICIENT_DATA, IndicatorSeries, evaluate, load_ruleset

POLICIES = Path(__file__).resolve().parents[2] / "rules" / "policies"


def _dates(n: int) -> np.ndarray:
    return np.arange(n) + np.datetime64("2031-02-01")


def _run_one_region(policy: str, **series: list[float]) -> np.ndarray:
    rs = load_ruleset(POLICIES / policy)
    ind = {k: IndicatorSeries(estimate=np.array([v], dtype=float)) for k, v in series.items()}
    n = len(next(iter(series.values())))
    return evaluate(rs, ind, regions=["r1"], dates=_dates(n)).tier[0]


# --- persistence rule (German state rule, December 2021 [seen], REFERENCES.md) -----------------
# "> 500 on 2 days brings measures from day 3; < 500 on 5 days lifts them on day 6."


def test_persistence_500_raises_from_third_day_and_lifts_on_sixth() -> None:
    incidence = [480, 510, 505, 520, 499, 490, 480, 470, 460, 450]
    # over 500 on days 1-2 -> in force from day 3; under on days 4-8 -> lifted on day 9
    expected = [0, 0, 0, 1, 1, 1, 1, 1, 1, 0]
    assert_array_equal(_run_one_region("persistence-500.yaml", incidence_7d=incidence), expected)


def test_persistence_500_exactly_500_is_not_over() -> None:
    # "over 500" is strict: 500 breaks the run of days over 500 (same source)
    incidence = [510, 500, 510, 490, 480, 470]
    assert_array_equal(
        _run_one_region("persistence-500.yaml", incidence_7d=incidence), [0, 0, 0, 0, 0, 0]
    )


def test_persistence_500_exactly_500_is_not_under() -> None:
    # "under 500" is strict: a day at exactly 500 restarts the 5-day release count (same source)
    incidence = [510, 520, 499, 498, 500, 497, 496, 495, 494, 493, 492]
    expected = [0, 0, 1, 1, 1, 1, 1, 1, 1, 1, 0]
    assert_array_equal(_run_one_region("persistence-500.yaml", incidence_7d=incidence), expected)


def test_persistence_500_one_day_over_does_nothing() -> None:
    incidence = [400, 600, 400, 600, 400, 600]
    assert_array_equal(_run_one_region("persistence-500.yaml", incidence_7d=incidence), [0] * 6)


# --- US CDC community transmission levels (2021) [seen], REFERENCES.md ------------------------
# higher of: cases per 100 000 in 7 days < 10 / 10-49.99 / 50-99.99 / >= 100 and
# test positivity < 5 / 5-7.99 / 8-9.99 / >= 10 %.
CDC_CASES = [
    pytest.param(9.99, 4.99, 0, id="low-both-just-under"),
    pytest.param(10.0, 0.0, 1, id="cases-10-moderate"),
    pytest.param(49.99, 0.0, 1, id="cases-49.99-moderate"),
    pytest.param(50.0, 0.0, 2, id="cases-50-substantial"),
    pytest.param(99.99, 0.0, 2, id="cases-99.99-substantial"),
    pytest.param(100.0, 0.0, 3, id="cases-100-high"),
    pytest.param(0.0, 5.0, 1, id="positivity-5-moderate"),
    pytest.param(0.0, 7.99, 1, id="positivity-7.99-moderate"),
    pytest.param(0.0, 8.0, 2, id="positivity-8-substantial"),
    pytest.param(0.0, 9.99, 2, id="positivity-9.99-substantial"),
    pytest.param(0.0, 10.0, 3, id="positivity-10-high"),
    pytest.param(12.0, 9.0, 2, id="higher-of-two-positivity"),
    pytest.param(120.0, 6.0, 3, id="higher-of-two-cases"),
]


@pytest.mark.parametrize(("cases", "positivity", "level"), CDC_CASES)
def test_cdc_2021_level_is_higher_of_two_metrics(
    cases: float, positivity: float, level: int
) -> None:
    tiers = _run_one_region(
        "cdc-2021-transmission.yaml", cases_7d=[cases], positivity_7d=[positivity]
    )
    assert_array_equal(tiers, [level])


def test_cdc_2021_follows_data_without_hysteresis() -> None:
    # the CDC levels are recomputed from each day's figures (same source): no band, no delay
    cases = [5, 60, 20, 150, 8]
    assert_array_equal(
        _run_one_region("cdc-2021-transmission.yaml", cases_7d=cases, positivity_7d=[1.0] * 5),
        [0, 2, 1, 3, 0],
    )


# --- Council Recommendation (EU) 2020/1475 as amended by (EU) 2021/119 [seen] ------------------
# green rate < 25 and positivity < 4 %; orange rate < 50 and positivity >= 4 %, or 25-150 and
# < 4 %; red 50-150 and >= 4 %, or > 150 and < 500; dark red >= 500; grey testing < 300.
EU_CASES = [
    pytest.param(24.9, 3.9, 400, 0, id="green"),
    pytest.param(25.0, 3.9, 400, 1, id="orange-rate-25"),
    pytest.param(10.0, 4.0, 400, 1, id="orange-low-rate-high-positivity"),
    pytest.param(49.9, 6.0, 400, 1, id="orange-rate-under-50-positivity-over-4"),
    pytest.param(150.0, 3.0, 400, 1, id="orange-rate-150-low-positivity"),
    pytest.param(50.0, 4.0, 400, 2, id="red-rate-50-positivity-4"),
    pytest.param(150.1, 1.0, 400, 2, id="red-rate-over-150"),
    pytest.param(499.9, 1.0, 400, 2, id="red-rate-under-500"),
    pytest.param(500.0, 1.0, 400, 3, id="dark-red-500"),
    pytest.param(30.0, 2.0, 299.0, INSUFFICIENT_DATA, id="grey-testing-under-300"),
    pytest.param(30.0, 2.0, 300.0, 1, id="testing-300-is-enough"),
    pytest.param(float("nan"), 2.0, 400, INSUFFICIENT_DATA, id="grey-rate-missing"),
]


@pytest.mark.parametrize(("rate", "positivity", "tests", "tier"), EU_CASES)
def test_eu_2020_1475_combined_indicator(
    rate: float, positivity: float, tests: float, tier: int
) -> None:
    tiers = _run_one_region(
        "eu-2020-1475.yaml", rate_14d=[rate], positivity_7d=[positivity], tests_7d=[tests]
    )
    assert_array_equal(tiers, [tier])


def test_eu_2020_1475_all_cases_vectorised_across_regions() -> None:
    # the same table as above, evaluated as one (regions, 1) batch: the vectorised path agrees
    rs = load_ruleset(POLICIES / "eu-2020-1475.yaml")
    rows = np.array([p.values for p in EU_CASES], dtype=float)
    ind = {
        "rate_14d": IndicatorSeries(estimate=rows[:, [0]]),
        "positivity_7d": IndicatorSeries(estimate=rows[:, [1]]),
        "tests_7d": IndicatorSeries(estimate=rows[:, [2]]),
    }
    ev = evaluate(rs, ind, regions=[p.id for p in EU_CASES], dates=_dates(1))
    assert_array_equal(ev.tier[:, 0], rows[:, 3].astype(int))


# --- German Infection Protection Act §28b (April 2021) [seen], REFERENCES.md -------------------
# "7-day incidence > 100 on 3 consecutive days brings measures from the day after next."
IFSG_28B = """
name: ifsg-28b
version: "2021-04"
tiers:
  - {name: Below, staff: "-", public: "-"}
  - {name: Emergency brake, staff: "-", public: "-"}
indicators:
  incidence_7d: {label: 7-day incidence}
criteria:
  - {id: incidence, indicator: incidence_7d, enter: [100], enter_strict: true,
     exit: [100], exit_strict: false}
timing: {confirm_days: 3, release_days: 5, effective_delay_days: 2}
"""


def test_ifsg_28b_measures_from_day_after_next() -> None:
    from rules import parse_ruleset

    rs = parse_ruleset(IFSG_28B)
    inc = np.array([[90, 101, 102, 103, 104, 105, 106]], dtype=float)
    ev = evaluate(
        rs, {"incidence_7d": IndicatorSeries(estimate=inc)}, regions=["r"], dates=_dates(7)
    )
    # third day over 100 is day 3; the day after next is day 5
    assert_array_equal(ev.tier[0], [0, 0, 0, 0, 0, 1, 1])
