"""Property-based invariants of the evaluator (hypothesis), on an invented 3-criterion ruleset."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from numpy.testing import assert_array_equal

from rules import IndicatorSeries, evaluate, parse_ruleset

TEMPLATE = """\
name: props
version: "1"
tiers:
  - {name: T0, staff: s, public: p}
  - {name: T1, staff: s, public: p}
  - {name: T2, staff: s, public: p}
  - {name: T3, staff: s, public: p}
indicators:
  a: {label: a}
  b: {label: b}
  c: {label: c}
criteria:
  - {id: a, indicator: a, enter: [20, 50, 80], exit: [15, 40, 70]}
  - {id: b, indicator: b, enter: [30, 60, 90], exit: [30, 55, 85]}
  - {id: c, indicator: c, direction: falling, enter: [70, 40, 10], exit: [80, 50, 20]}
combination: COMBINATION
timing: {confirm_days: CONFIRM, release_days: RELEASE}
"""
COMBOS = [
    "{method: highest}",
    "{method: at_least, m: 2}",
    "{method: score, weights: {a: 1, b: 1, c: 2}, cutoffs: [2, 4, 7]}",
]

values = arrays(np.float64, (3, 4, 30), elements=st.floats(0, 100, width=32))
nan_mask = arrays(np.bool_, (3, 4, 30))

# CI falsifying example: every value 71 except criteria a and b of region x on the first day
_FALSIFYING_X = np.full((3, 4, 30), 71.0)
_FALSIFYING_X[:2, 1, 0] = 0.0


def _rules(combo: str, confirm: int, release: int):  # type: ignore[no-untyped-def]
    return parse_ruleset(
        TEMPLATE.replace("COMBINATION", combo)
        .replace("CONFIRM", str(confirm))
        .replace("RELEASE", str(release))
    )


def _eval(rs, x: np.ndarray, stale: np.ndarray | None = None):  # type: ignore[no-untyped-def]
    ind = {
        name: IndicatorSeries(estimate=x[i], stale=None if stale is None else stale[i])
        for i, name in enumerate("abc")
    }
    return evaluate(
        rs,
        ind,
        regions=["w", "x", "y", "z"],
        dates=np.arange(x.shape[2]) + np.datetime64("2031-06-01"),
    )


@settings(max_examples=60, deadline=None)
@given(values, st.integers(1, 6), st.sampled_from(COMBOS))
def test_evaluate_no_change_within_n_days_of_another(x: np.ndarray, n: int, combo: str) -> None:
    ev = _eval(_rules(combo, n, n), x)
    for row in ev.decided:
        changes = np.flatnonzero(np.diff(row.astype(int)) != 0)
        assert np.all(np.diff(changes) >= n)


@settings(max_examples=60, deadline=None)
@given(values, nan_mask, st.integers(1, 4), st.sampled_from(COMBOS))
def test_evaluate_stale_criterion_never_lowers_or_raises_alone(
    x: np.ndarray, stale: np.ndarray, n: int, combo: str
) -> None:
    ev = _eval(_rules(combo, n, n + 1), x, stale)
    prev = np.concatenate([ev.start_tier[:, None], ev.decided[:, :-1]], axis=1)
    any_unknown = ~ev.known.all(axis=0)
    lowered = ev.decided < prev
    raised = ev.decided > prev
    # a fall needs the candidate to be lower whatever the stale criteria were ...
    assert np.all(ev.candidate_high[lowered] <= ev.decided[lowered])
    # ... and a rise must be carried by the known criteria alone (stale ones counted at 0)
    assert np.all(ev.candidate_low[raised] >= ev.decided[raised])
    if combo == COMBOS[0]:  # highest: any unknown criterion blocks every fall that day
        assert not np.any(lowered & any_unknown)


def _worse(x: np.ndarray, delta: np.ndarray) -> np.ndarray:
    worse = x.copy()
    worse[:2] += delta[:2]  # a and b are rising criteria
    worse[2] -= delta[2]  # c is falling: lower is worse
    return worse


# "Raising every value never lowers any tier" cannot hold together with the gap invariant above
# (no change within n days of another) once confirm_days >= 2, for any rule that decides each day
# from the days so far. Worked case (confirm_days 2, combination highest): candidates 0, 2, 2 give
# tiers 0, 0, 2; the raised values give candidates 1, 2, 2. On day 1 the raised region has seen
# "at least 1" on 2 days, so it must rise to 1 (as it would for candidates 1, 1); to be at 2 on
# day 2 as well it would have to change again one day later, which the gap invariant forbids.
# The engine keeps the gap invariant (a step restarts the confirmation count: no flapping) and the
# raised region reaches 2 one day later. The release count behaves the same way (second CI case),
# and a hysteresis band can hold a raised region back longer still (third CI case): a region that
# rose early to a lower tier must cross the next tier's enter threshold, while one already there
# only has to stay inside the band. A bound on how long a raised region may stay lower was tried
# as a property and hypothesis found counterexamples to each version (also without bands), so no
# such bound is claimed. What holds, and is tested: with confirm_days and release_days 1 raising
# values never lowers a tier, and raising values never delays the first escalation; the three CI
# cases are kept as worked, day-by-day regressions at the end of this file.
@settings(max_examples=60, deadline=None)
@given(
    values,
    arrays(np.float64, (3, 4, 30), elements=st.floats(0, 30, width=32)),
    st.sampled_from(COMBOS),
)
def test_evaluate_raising_values_never_lowers_a_tier_with_one_day_to_confirm_and_release(
    x: np.ndarray, delta: np.ndarray, combo: str
) -> None:
    # With release_days >= 2 the property fails for the same reason as with confirm_days >= 2
    # (a step restarts the count): see the second CI case, tested day by day below.
    rs = _rules(combo, 1, 1)
    assert np.all(_eval(rs, _worse(x, delta)).tier >= _eval(rs, x).tier)


@settings(max_examples=60, deadline=None)
@given(
    values,
    arrays(np.float64, (3, 4, 30), elements=st.floats(0, 30, width=32)),
    st.integers(1, 4),
    st.integers(1, 6),
    st.sampled_from(COMBOS),
)
def test_evaluate_raising_values_never_delays_the_first_escalation(
    x: np.ndarray, delta: np.ndarray, confirm: int, release: int, combo: str
) -> None:
    rs = _rules(combo, confirm, release)

    def first_rise(tier: np.ndarray) -> np.ndarray:
        up = tier > 0
        return np.where(up.any(axis=1), up.argmax(axis=1), tier.shape[1])

    raised, base = _eval(rs, _worse(x, delta)).tier, _eval(rs, x).tier
    assert np.all(first_rise(raised) <= first_rise(base))


def test_evaluate_raised_values_step_through_the_lower_tier_regression() -> None:
    # the first CI falsifying case, day by day (worked case in the comment above; own derivation):
    # base candidates 0, 2, 2 -> tiers 0, 0, 2; raised candidates 1, 2, 2, 2 -> 0, 1, 1, 2
    rs = _rules(COMBOS[0], 2, 1)
    raised, base = _eval(rs, _worse(_FALSIFYING_X, np.ones((3, 4, 30)))), _eval(rs, _FALSIFYING_X)
    assert_array_equal(base.candidate[1, :4], [0, 2, 2, 2])
    assert_array_equal(raised.candidate[1, :4], [1, 2, 2, 2])
    assert_array_equal(base.tier[1, :4], [0, 0, 2, 2])
    assert_array_equal(raised.tier[1, :4], [0, 1, 1, 2])
    assert np.all(np.diff(np.flatnonzero(np.diff(raised.tier[1].astype(int)))) >= 2)


def test_evaluate_raised_values_fall_later_but_deeper_regression() -> None:
    # The second CI falsifying case (confirm 1, release 2, at least 2 of 3), own derivation: region
    # w has a = 80, 40, 0, ... and b = c = 0; the raised copy adds 30 to a and b and takes 30 off c.
    # Base candidates 3, 2, 0, 0: on day 2 two release days have passed, the tier falls to the
    # highest candidate of those days (2) and the release count restarts, so it stays at 2 on day
    # 3. Raised candidates 3, 3, 1, 1: its release completes a day later, on day 3, straight to 1.
    # On day 3 the raised region is lower (1 < 2): no flapping forbids the base a second step.
    x = np.zeros((3, 4, 30))
    x[0, 0, :2] = [80.0, 40.0]
    rs = _rules(COMBOS[1], 1, 2)
    base, raised = _eval(rs, x), _eval(rs, _worse(x, np.full((3, 4, 30), 30.0)))
    assert_array_equal(base.candidate[0, :4], [3, 2, 0, 0])
    assert_array_equal(raised.candidate[0, :4], [3, 3, 1, 1])
    assert_array_equal(base.tier[0, :5], [3, 3, 2, 2, 0])
    assert_array_equal(raised.tier[0, :5], [3, 3, 3, 1, 1])


def test_evaluate_raised_values_held_back_by_the_band_regression() -> None:
    # The third CI falsifying case (confirm 3, release 1, score a 1 + b 1 + c 2 with cutoffs 2, 4,
    # 7), own derivation: region x has every value 20 but c = 71 on day 0 and 41 on day 4; the
    # raised copy adds 10 to b on day 0. Base: candidate 2 on days 1-3 rises to 2 on day 3, and on
    # day 4 c = 41 stays inside tier 2's band (enter 40, exit 50; falling). Raised: b = 30 on day 0
    # makes candidate 1 on days 0-2, so it rises to 1 on day 2; at tier 1, c = 41 does not cross
    # tier 2's enter threshold 40, which restarts the confirmation and delays tier 2 to day 7.
    x = np.full((3, 4, 30), 20.0)
    x[2, 1, 0], x[2, 1, 4] = 71.0, 41.0
    delta = np.zeros((3, 4, 30))
    delta[1, 1, 0] = 10.0
    rs = _rules(COMBOS[2], 3, 1)
    base, raised = _eval(rs, x), _eval(rs, _worse(x, delta))
    assert_array_equal(base.tier[1, :9], [0, 0, 0, 2, 2, 2, 2, 2, 2])
    assert_array_equal(raised.tier[1, :9], [0, 0, 1, 1, 1, 1, 1, 2, 2])
