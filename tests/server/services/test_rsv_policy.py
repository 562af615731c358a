"""A policy on the seasonal intensity of RSV, added as YAML text alone (issue 14, item 6).

The done-when of the indicator-kind registry: a policy can use any registered indicator kind on
any measure without code changes. Here a policy written in the test grades districts by
``kind: seasonal_intensity`` on ``measure: gp_ari.rsv`` (a pathogen-specific measure of the
store's catalogue), is evaluated from a small store through ``evaluate_districts``, and its tiers
are checked against the weekly levels computed directly by
:func:`server.indicators.seasonal.seasonal_intensity`, the moving epidemic method of Vega et al.
(2013), whose thresholds that module's own tests check against the published method
(tests/server/indicators/test_seasonal.py). The weekly sums and rates here are computed by numpy
reshapes in the test, not by the service.
"""

from __future__ import annotations

from datetime import UTC, date, datetime

import numpy as np
import pandas as pd
from numpy.testing import assert_array_equal

from rules import parse_ruleset
from server.indicators.seasonal import season_layout, seasonal_intensity
from server.services.evaluation import evaluate_districts
from server.store import MeasureRecord, RegionRecord, upsert_measures, upsert_regions
from server.store.models import Ruleset as RulesetRow
from server.store.vintages import append_vintage

POLICY = """\
name: rsv-test
version: "1"
tiers:
  - {name: Calm, staff: s, public: p}
  - {name: Season, staff: s, public: p}
  - {name: Strain, staff: s, public: p}
indicators:
  rsv_level:
    kind: seasonal_intensity
    measure: gp_ari.rsv
    label: RSV intensity
    decimals: 0
    max_age_days: 13
criteria:
  - {id: rsv, indicator: rsv_level, enter: [2, 3], exit: [1, 2]}
timing: {confirm_days: 1, release_days: 1, min_days_in_tier: 0, effective_delay_days: 0}
"""
ENTER, EXIT = (2, 3), (1, 2)

START = date(2020, 8, 3)   # a Monday
WEEKS = 5 * 52 + 30
REGIONS = ("RA", "RB")
POPULATION = np.array([30_000.0, 90_000.0])
OTHERS = ("cases", "tests", "positives", "hosp_admissions", "gp_ari", "icu_occupied",
          "icu_staffed", "ww_concentration", "ww_flow")


def _counts(seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Invented daily RSV consultations (regions, days) with a December wave whose height
    varies by season, and the ISO week Mondays."""
    rng = np.random.default_rng(seed)
    days = WEEKS * 7
    dates = np.datetime64(START) + np.arange(days).astype("timedelta64[D]")
    mondays = dates[::7]
    lay = season_layout(mondays)
    pos = np.repeat(lay.position, 7)
    season = np.repeat(lay.season, 7)
    height = 1 + 10 * rng.uniform(0.5, 1.5, size=season.max() + 2)[season]
    wave = np.where(pos >= 0, np.exp(-0.5 * ((pos - 11) / 3.0) ** 2), 0.0) * (height - 1)
    mean = np.array([[1.5], [4.0]]) * (1 + wave)[None, :]
    return rng.poisson(mean).astype(float), mondays


def _reference_tiers(level: np.ndarray) -> np.ndarray:
    """Tiers by the criterion's enter/exit thresholds with 1-day confirm and release (the
    hysteresis rule of rules/hysteresis.py's docstring: rise to the highest tier whose enter
    threshold is met, fall to the highest tier whose exit threshold is still met; an unknown
    day keeps the tier). Common practice, no source."""
    out = np.full(level.shape, -1)
    for r in range(level.shape[0]):
        tier = -1
        for t, v in enumerate(level[r]):
            if np.isfinite(v):
                up = sum(v >= e for e in ENTER)
                hold = max([k for k in range(1, max(tier, 0) + 1) if v >= EXIT[k - 1]] or [0])
                tier = max(up, min(max(tier, 0), hold)) if tier >= 0 else up
            out[r, t] = tier
    return out


def test_rsv_policy_follows_the_mem_levels_of_gp_ari_rsv(session) -> None:  # type: ignore[no-untyped-def]
    rsv, mondays = _counts(seed=5)
    other, _ = _counts(seed=99)   # a different series under gp_ari: reading it would fail
    upsert_regions(session=session, records=[
        RegionRecord(code=c, name=f"Wendel {c}", level="district", parent=None,
                     population=int(p)) for c, p in zip(REGIONS, POPULATION, strict=True)])
    upsert_measures(session=session, records=[
        *(MeasureRecord(name=m, unit="n", kind="count", aggregation="sum") for m in OTHERS),
        MeasureRecord(name="gp_ari.rsv", unit="n", kind="count", aggregation="sum",
                      pathogen="rsv")])
    days = pd.date_range(START, periods=rsv.shape[1], freq="D").date
    rows = pd.DataFrame(
        [(code, measure, day, float(v))
         for measure, values in (("gp_ari.rsv", rsv), ("gp_ari", other * 3))
         for r, code in enumerate(REGIONS) for day, v in zip(days, values[r], strict=True)],
        columns=["region", "measure", "ref_date", "value"])
    append_vintage(session=session, feed="gp", received_at=datetime(2026, 3, 1, tzinfo=UTC),
                   checksum="rsv-policy-test", rows=rows)
    rs = parse_ruleset(POLICY)
    row = RulesetRow(name=rs.name, version=str(rs.version), yaml_text=POLICY, sha256=rs.sha256,
                     author="t", created_at=datetime.now(UTC), status="draft")
    session.add(row)
    session.flush()
    run = evaluate_districts(session=session, ruleset_row=row)
    assert run is not None and run.evaluation is not None
    ev = run.evaluation
    order = [ev.regions.index(c) for c in REGIONS]

    # reference: ISO-week sums per 100 000, MEM levels (defaults of the mem package: seasons
    # weeks 40..20, 10 past seasons pooled, at least 3), each day reading its newest full week
    weekly = rsv.reshape(len(REGIONS), WEEKS, 7).sum(axis=2) / POPULATION[:, None] * 1e5
    ref = seasonal_intensity(weekly, mondays)
    week_of_day = np.arange(rsv.shape[1]) // 7
    full = np.arange(rsv.shape[1]) % 7 == 6       # a Sunday completes its week
    newest = np.where(full, week_of_day, week_of_day - 1)
    expected = np.where(newest >= 0, ref.level[:, np.maximum(newest, 0)], np.nan)
    got = ev.indicators["rsv_level"].estimate[order]
    assert_array_equal(got, expected)
    # the levels span the scale and the baseline needs three past seasons
    assert set(np.unique(expected[np.isfinite(expected)])) == {0.0, 1.0, 2.0, 3.0, 4.0}
    # the Sunday ending ISO week 21 of 2023 first reads a week after the third season (2020/21,
    # 2021/22, 2022/23: weeks 40..20) has ended
    first = int(np.flatnonzero(days == date(2023, 5, 28))[0])
    assert np.isnan(expected[:, :first]).all() and np.isfinite(expected[:, first:]).all()

    tiers = ev.tier[order]
    reference = _reference_tiers(expected)
    known = reference >= 0
    assert known.sum() > 500
    assert_array_equal(tiers[known], reference[known])
    assert {0, 1, 2} <= set(np.unique(tiers[known]))
