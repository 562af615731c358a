"""Property-based invariants of the evaluator (hypothesis), on an invented 3-criterion ruleset."""

from __future__ import annotations

import numpy as np
from hypothesis import example, given, settings
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


def _rose_recently(tier: np.ndarray, days: int) -> np.ndarray:
    """True where the tier rose on one of the ``days - 1`` days before (not counting the day)."""
    return _moved_recently(tier, days, up=True)


def _moved_recently(tier: np.ndarray, days: int, *, up: bool) -> np.ndarray:
    """True where the tier rose (``up``) or fell on the day or one of the ``days - 1`` before."""
    moved = np.zeros(tier.shape, dtype=bool)
    moved[:, 1:] = tier[:, 1:] > tier[:, :-1] if up else tier[:, 1:] < tier[:, :-1]
    out = np.zeros(tier.shape, dtype=bool)
    for k in range(1, days):
        out[:, k:] |= moved[:, : tier.shape[1] - k]
    return out


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
# raised region reaches 2 one day later. The release count behaves the same way (second CI case,
# at the end of this file). What must hold, and is tested below: with confirm_days and
# release_days 1 raising values never lowers a tier; in general a raised region is lower only on
# the confirm_days - 1 days after one of its own rises or the release_days - 1 days after a fall
# of the other (a fresh period running), and its first escalation never comes later.
@settings(max_examples=60, deadline=None)
@given(
    values,
    arrays(np.float64, (3, 4, 30), elements=st.floats(0, 30, width=32)),
    st.integers(1, 4),
    st.integers(1, 6),
    st.sampled_from(COMBOS),
)
@example(  # the falsifying case found by CI: one region's a and b at 0 on its first day
    x=_FALSIFYING_X,
    delta=np.ones((3, 4, 30)),
    confirm=2,
    release=1,
    combo=COMBOS[0],
)
def test_evaluate_raising_values_lowers_a_tier_only_in_a_fresh_period(
    x: np.ndarray, delta: np.ndarray, confirm: int, release: int, combo: str
) -> None:
    rs = _rules(combo, confirm, release)
    raised, base = _eval(rs, _worse(x, delta)).tier, _eval(rs, x).tier
    lower = raised < base
    fresh_rise = _rose_recently(raised.astype(np.int32), confirm)
    # the release twin (second CI case below): the base region stepped down on a day whose
    # release period is still running, so it cannot follow the raised region's later, deeper fall
    fresh_fall = _moved_recently(base.astype(np.int32), release, up=False)
    assert not np.any(lower & ~fresh_rise & ~fresh_fall)


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
    # the CI falsifying case, day by day (worked case in the comment above; own derivation):
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
