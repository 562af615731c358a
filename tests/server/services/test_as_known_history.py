"""The as-known replay of indicators whose kinds need their calendar and a long history.

``seasonal_intensity`` (the moving epidemic method, Vega et al. 2013) places each ISO week
against thresholds from past seasons, and ``wastewater_level`` sets each sample against a year
of the plant's samples, so the replay cannot compute them on its trailing windows: it computes
them each morning from everything known that morning
(:class:`server.services.as_known_replay._History`). ``wastewater_level`` exists on sample
days only: as for every such kind in the replay, the newest sample known that morning counts
on the morning it first became known. The reference here is the daily
evaluation itself: the data of that morning read through the store's as-of read
(:func:`server.services.level_data.policy_data`) over the span the evaluation reads
(first to last day known at the cutoff), its indicators computed as the evaluation computes
them. The method's own figures are checked against published values in
tests/server/indicators (seasonal); this file checks only that the replay reproduces, morning
by morning, what the evaluation of that morning computed.

Invented demo data throughout (the conftest's seeded demo county, read only).
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pytest

from rules import parse_ruleset
from server.config import Settings
from server.services.as_known_replay import as_known_indicators
from server.services.backtest import as_known_cutoff, data_span, run_backtest
from server.services.database import Database
from server.services.district_data import store_measures
from server.services.district_indicators import district_indicators
from server.services.evaluation import _date_range
from server.services.indicator_kinds import history_indicators, measure_needs
from server.services.level_data import policy_data
from server.services.rulesets import policies_dir

POLICIES = ("influenza.yaml", "rsv.yaml")

#: An invented test policy: one criterion on the wastewater level with the kind's defaults (a
#: 365-day baseline, 10 samples at least). No packaged policy declares the kind.
WW_LEVEL_POLICY = """\
name: ww-level-test
version: "1"
tiers:
  - {name: Quiet, staff: s0, public: p0}
  - {name: Raised, staff: s1, public: p1}
indicators:
  ww_level: {label: wastewater level, kind: wastewater_level, unit: SD}
criteria:
  - {id: ww, indicator: ww_level, enter: [1.5], exit: [1]}
"""


@pytest.fixture(scope="module")
def demo(several_policies_file: Path) -> Iterator[Database]:
    """The seeded demo (150 days to 30 Nov 2026 over five years of pathogen seasons); read only."""
    db = Database.from_settings(
        Settings(database_url=f"sqlite:///{several_policies_file}", demo_mode=True))
    yield db
    db.dispose()


def _policy(name: str):  # type: ignore[no-untyped-def]
    return parse_ruleset((policies_dir(None) / name).read_text())


def _morning(s, rs, needs, day: date, zone, name: str):  # type: ignore[no-untyped-def]
    """That morning's evaluation of ``rs``'s indicator ``name``: the store's as-of read at the
    morning's cutoff over the span it reads, and the first day of that span."""
    measures = (*needs.district, *needs.area, *needs.plant)
    cutoff = as_known_cutoff(day, zone)
    span = _date_range(s, cutoff, measures)  # the span that morning's evaluation reads
    assert span is not None
    data = policy_data(session=s, ruleset=rs, start=span[0], end=span[1], as_of=cutoff,
                       needs=needs)
    return district_indicators(data, rs, names=[name])[name], span[0]


def _same(a: np.ndarray | None, b: np.ndarray | None) -> None:
    assert (a is None) == (b is None)
    if a is not None and b is not None:
        np.testing.assert_allclose(np.asarray(a, dtype=np.float64),
                                   np.asarray(b, dtype=np.float64), rtol=0, atol=1e-9)


@pytest.mark.parametrize(("policy", "names"), [
    ("influenza.yaml", ("flu_intensity",)), ("rsv.yaml", ("rsv_intensity",)),
    ("county.yaml", ("testing_change",)),  # its wastewater is ww_trend, on 15-day windows
    ("hospital.yaml", ()), ("cdc-2021-transmission.yaml", ()), ("eu-2020-1475.yaml", ()),
    ("persistence-500.yaml", ()),
])
def test_history_indicators_of_the_packaged_policies(policy: str, names: tuple[str, ...]) -> None:
    # seasonal_intensity, testing_change and wastewater_level are history kinds; no packaged
    # policy declares wastewater_level
    assert history_indicators(_policy(policy)) == names


def test_wastewater_level_is_a_history_kind() -> None:
    assert history_indicators(parse_ruleset(WW_LEVEL_POLICY)) == ("ww_level",)


@pytest.mark.slow
@pytest.mark.parametrize("policy", (*POLICIES, "county.yaml"))
def test_replay_equals_each_mornings_evaluation(demo: Database, policy: str) -> None:
    rs = _policy(policy)
    (name,) = history_indicators(rs)
    zone = Settings(demo_mode=True).zone
    with demo.transaction() as s:
        needs = measure_needs(rs, store_measures(session=s))
        measures = (*needs.district, *needs.area, *needs.plant)
        first, last = data_span(session=s, measures=measures)
        _view, replayed = as_known_indicators(s, rs, first, last, lambda _n: None, zone)
        series = replayed[name]
        known = np.flatnonzero(np.isfinite(series.estimate).any(axis=0))
        assert known.size > 60  # the demo's 150 days, less the days before a week or a change
        last_day = (last - first).days
        # the first morning with a value, a week later, each weekday of one week of the season,
        # and the last two mornings
        sunday = next(t for t in range(last_day - 30, last_day)
                      if (first + timedelta(days=t)).isoweekday() == 7)
        mornings = sorted({int(known[0]), int(known[0]) + 7, *range(sunday - 1, sunday + 7),
                           last_day - 1, last_day})
        compared = 0
        for t in mornings:
            day = first + timedelta(days=t)
            daily, start = _morning(s, rs, needs, day, zone, name)
            col = (day - start).days
            _same(series.estimate[:, t], daily.estimate[:, col])
            for key in ("age_days", "no_baseline", "size", "lower", "upper"):
                mine, theirs = getattr(series, key), getattr(daily, key)
                _same(None if mine is None else mine[:, t],
                      None if theirs is None else theirs[:, col])
            assert not (daily.invalid is not None and daily.invalid[:, col].any())
            compared += int(np.isfinite(daily.estimate[:, col]).sum())
        assert compared > 0  # levels were compared, not only missing values


@pytest.mark.slow
def test_replayed_wastewater_level_is_each_mornings_newest_sample(demo: Database) -> None:
    # Morning t's value is the level of the newest sample its evaluation computed, kept on the
    # morning that sample first became known (newer than morning t - 1's newest), with its age
    # in days; the reference is each of those two mornings' evaluation.
    rs = parse_ruleset(WW_LEVEL_POLICY)
    zone = Settings(demo_mode=True).zone
    with demo.transaction() as s:
        needs = measure_needs(rs, store_measures(session=s))
        first, last = data_span(session=s, measures=(*needs.district, *needs.area, *needs.plant))
        _view, replayed = as_known_indicators(s, rs, first, last, lambda _n: None, zone)
        series = replayed["ww_level"]
        last_day = (last - first).days
        # a week of mornings before the 56th day (the replay's windows hold every day
        # then), a week long after it, and the last two mornings
        mornings = sorted({*range(40, 48), *range(last_day - 20, last_day - 12),
                           last_day - 1, last_day})
        newest: dict[int, np.ndarray] = {}  # morning -> day index of each region's newest level
        fresh = 0
        for t in sorted({*mornings, *(t - 1 for t in mornings)}):
            day = first + timedelta(days=t)
            daily, start = _morning(s, rs, needs, day, zone, "ww_level")
            est = daily.estimate
            finite = np.isfinite(est)
            col = np.where(finite, np.arange(est.shape[1]), -1).max(axis=1)
            newest[t] = np.where(col >= 0, col + (start - first).days, -1)
            assert not (daily.invalid is not None and daily.invalid[:, (day - start).days].any())
            if t - 1 not in newest:
                continue
            new = newest[t] > newest[t - 1]
            value = est[np.arange(est.shape[0]), np.maximum(col, 0)]
            _same(series.estimate[:, t], np.where(new, value, np.nan))
            _same(series.age_days[:, t], np.where(col >= 0, t - newest[t], np.nan))
            fresh += int(new.sum())
        assert fresh > 20  # new samples were compared, not only mornings without one
        # known long after the replay's 56-day windows, on the days new samples arrive
        assert np.isfinite(series.estimate[:, 100:]).sum() > 100


@pytest.mark.slow
@pytest.mark.parametrize("policy", POLICIES)
def test_as_known_backtest_runs_on_the_demo(demo: Database, policy: str) -> None:
    """The influenza and RSV backtests as known (they failed on the seasonal indicator)."""
    rs = _policy(policy)
    with demo.transaction() as s:
        result = run_backtest(session=s, ruleset=rs, as_known=True,
                              time_zone=Settings(demo_mode=True).zone)
    ev = result.evaluation
    assert ev.dates[-1].astype(date) == date(2026, 11, 30)
    assert ev.tier.shape == (14, ev.dates.size)
    (name,) = history_indicators(rs)
    (c,) = [i for i, crit in enumerate(rs.criteria) if crit.indicator == name]
    # the seasonal criterion is known in the current season once weeks are complete, and
    # nowhere before the seeded archive was received (nothing was known those mornings)
    assert ev.known[c][:, -30:].mean() > 0.5
    assert not ev.known[c][:, :100].any()
    assert result.summary is not None
