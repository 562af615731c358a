"""Prepare signals (rules/signals.py): runs over days or samples, quiet period, tier limit.

Recurrences from the module docstring, worked day by day on invented values (n = ``for``,
q = ``clear_after_days``): a signal fires when its run reaches n and stays on until the condition
has not held for q days.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rules import EvaluationInputError, IndicatorSeries, parse_ruleset
from rules.signals import SignalState, compare, evaluate_signals
from tests.rules.conftest import THREE_TIERS

RULES = 'name: signals\nversion: "1"\n' + THREE_TIERS + """\
indicators:
  incidence: {label: incidence}
  trend: {label: trend, max_age_days: 2}
criteria:
  - {id: inc, indicator: incidence, enter: [50, 150], exit: [40, 120]}
prepare:
  - {id: SIGNAL}
"""
NAN = np.nan


def _signal(spec: str, trend: list[float], in_force: list[int] | None = None, **extra: object):  # type: ignore[no-untyped-def]
    rs = parse_ruleset(RULES.replace("{id: SIGNAL}", "{id: s, indicator: trend, " + spec + "}"))
    n = len(trend)
    series = {
        "incidence": IndicatorSeries(estimate=np.zeros((1, n))),
        "trend": IndicatorSeries(estimate=np.array([trend], dtype=float), **extra),  # type: ignore[arg-type]
    }
    tiers = np.array([in_force if in_force is not None else [0] * n], dtype=np.int32)
    return evaluate_signals(rs, series, tiers, SignalState.initial(1, 1))


def test_evaluate_signals_fires_when_the_run_reaches_for() -> None:
    shown, met, run, _ = _signal("above: 0, for: 3", [1, 1, 1, 1])
    assert_array_equal(met[0, 0], [True] * 4)
    assert_array_equal(run[0, 0], [1, 2, 3, 4])
    assert_array_equal(shown[0, 0], [False, False, True, True])


def test_evaluate_signals_days_missing_day_breaks_the_run() -> None:
    shown, _, run, _ = _signal("above: 0, for: 3", [1, 1, NAN, 1, 1, 1])
    assert_array_equal(run[0, 0], [1, 2, 0, 1, 2, 3])
    assert_array_equal(shown[0, 0], [False] * 5 + [True])


def test_evaluate_signals_samples_skip_missing_days() -> None:
    shown, _, run, _ = _signal("above: 0, for: 3, count_by: samples", [1, NAN, 1, NAN, 1])
    assert_array_equal(run[0, 0], [1, 1, 2, 2, 3])
    assert_array_equal(shown[0, 0], [False, False, False, False, True])


def test_evaluate_signals_samples_reset_on_a_sample_not_met() -> None:
    _, _, run, _ = _signal("above: 0, for: 3, count_by: samples", [1, NAN, -1, 1])
    assert_array_equal(run[0, 0], [1, 1, 0, 1])


def test_evaluate_signals_clears_after_the_quiet_period() -> None:
    # fired on day 1; not met from day 2: quiet 1, 2, 3 -> off on day 4 (quiet reaches 3)
    shown, _, _, _ = _signal("above: 0, for: 2, clear_after_days: 3", [1, 1, 0, 0, 0, 0])
    assert_array_equal(shown[0, 0], [False, True, True, True, False, False])


def test_evaluate_signals_a_met_day_restarts_the_quiet_period() -> None:
    shown, _, _, _ = _signal(
        "above: 0, for: 2, clear_after_days: 3", [1, 1, 0, 0, 1, 0, 0, 0]
    )
    assert_array_equal(shown[0, 0], [False, True, True, True, True, True, True, False])


def test_evaluate_signals_stale_values_count_as_missing() -> None:
    # trend max_age_days 2: day 2 is 3 days old
    _, met, run, _ = _signal("above: 0, for: 5", [1, 1, 1, 1], age_days=np.array([[0, 1, 3, 0.0]]))
    assert_array_equal(met[0, 0], [True, True, False, True])
    assert_array_equal(run[0, 0], [1, 2, 0, 1])


def test_evaluate_signals_below_tier_hides_at_or_above_it_and_on_insufficient_data() -> None:
    shown, _, _, _ = _signal("above: 0, for: 1, below_tier: 2", [1] * 4, in_force=[0, 1, 2, -1])
    assert_array_equal(shown[0, 0], [True, True, False, False])


def test_evaluate_signals_bound_statistic_reads_the_bound() -> None:
    shown, _, _, _ = _signal(
        "statistic: lower, above: 0, for: 1", [5, 5], lower=np.array([[-1.0, 0.5]]),
        upper=np.array([[9.0, 9.0]]),
    )
    assert_array_equal(shown[0, 0], [False, True])


def test_evaluate_signals_missing_bound_is_named() -> None:
    with pytest.raises(EvaluationInputError, match=r"indicators\['trend'\]\.upper"):
        _signal("statistic: upper, below: 0, for: 1", [1.0])


def test_evaluate_signals_state_continues_exactly() -> None:
    values = [1, 1, 0, 1, 1, 1, 0, 0, 0, 1]
    spec = "above: 0, for: 2, clear_after_days: 2"
    whole, _, _, _ = _signal(spec, values)
    rs = parse_ruleset(RULES.replace("{id: SIGNAL}", "{id: s, indicator: trend, " + spec + "}"))
    state = SignalState.initial(1, 1)
    parts = []
    for chunk in (values[:4], values[4:]):
        series = {
            "incidence": IndicatorSeries(estimate=np.zeros((1, len(chunk)))),
            "trend": IndicatorSeries(estimate=np.array([chunk], dtype=float)),
        }
        shown, _, _, state = evaluate_signals(
            rs, series, np.zeros((1, len(chunk)), dtype=np.int32), state
        )
        parts.append(shown[0, 0])
    assert_array_equal(np.concatenate(parts), whole[0, 0])


@pytest.mark.parametrize(
    ("op", "expected"),
    [
        pytest.param("above", [False, False, True, False], id="above"),
        pytest.param("at_least", [False, True, True, False], id="at-least"),
        pytest.param("below", [True, False, False, False], id="below"),
        pytest.param("at_most", [True, True, False, False], id="at-most"),
    ],
)
def test_compare_each_operator_and_nan(op: str, expected: list[bool]) -> None:
    assert_array_equal(compare(np.array([1.0, 2.0, 3.0, NAN]), op, 2.0), expected)
