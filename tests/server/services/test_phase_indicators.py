"""The ``wave_phase`` indicator: built from the pure fit, held between cutoffs, worded in words."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
from numpy.testing import assert_array_equal
from sqlalchemy.orm import Session

from rules import evaluate, parse_ruleset
from rules.formatting import CATEGORIES
from server.indicators.curves import richards_cumulative
from server.indicators.phase import GROWING, PHASE_LABELS, fit_phase
from server.services.district_data import DistrictData
from server.services.district_indicators import district_indicators
from server.services.phase_indicators import STRIDE_DAYS, WINDOW_DAYS

RULES = """\
name: phase
version: "1"
tiers:
  - {name: Calm, staff: s, public: p}
  - {name: Watch, staff: s, public: p}
indicators:
  wave_phase: {label: Wave phase, decimals: 0}
criteria:
  - {id: phase, indicator: wave_phase, enter: [3], exit: [2]}
timing: {confirm_days: 1, release_days: 1, min_days_in_tier: 0, effective_delay_days: 0}
"""
DAYS = 200


def _data() -> DistrictData:
    t = np.arange(DAYS, dtype=float)

    def wave(k: float, a: float, t0: float) -> np.ndarray:
        return richards_cumulative(t, k, a, t0) - richards_cumulative(t - 1, k, a, t0)

    rng = np.random.default_rng(7)
    cases = np.vstack([
        rng.poisson(wave(40000, 0.12, 230) + 2),  # still growing on the last day
        rng.poisson(wave(9000, 0.2, 150) + 2),    # long past its turning point
        np.zeros(DAYS),                           # no cases: no phase
    ]).astype(float)
    n = cases.shape[0]
    district = {m: np.full((n, DAYS), np.nan) for m in ("tests", "positives", "hosp_admissions",
                                                         "gp_ari")}
    district["cases"] = cases
    return DistrictData(
        regions=("P1", "P2", "P3"), levels=("district",) * 3,
        population=np.full(n, 50000.0), dates=np.arange(
            np.datetime64("2026-01-01"), np.datetime64("2026-01-01") + DAYS),
        district=district, area_of_district={}, plant={}, plant_population=np.zeros(0),
        served=np.zeros((n, 0)), as_of=None,
    )


def test_wave_phase_is_the_pure_fit_on_each_cutoff_and_held_between() -> None:
    data = _data()
    rs = parse_ruleset(RULES)
    series = district_indicators(data, rs)["wave_phase"]
    last = DAYS - 1
    for cut in (last, last - STRIDE_DAYS):
        window = data.district["cases"][:, cut - WINDOW_DAYS + 1: cut + 1]
        assert_array_equal(series.estimate[:, cut], fit_phase(window).phase)
    assert series.estimate[0, last] == GROWING
    assert series.estimate[1, last] in (0, 1)  # declining or past its turning point
    assert np.isnan(series.estimate[2]).all()
    # Between cutoffs the newest value is held and ages; before the first cutoff: unknown.
    assert_array_equal(series.estimate[:2, last - 1], series.estimate[:2, last - STRIDE_DAYS])
    assert series.age_days is not None and series.age_days[0, last - 1] == STRIDE_DAYS - 1
    assert np.isnan(series.estimate[:, : last - 28]).all()


def test_explanation_writes_the_phase_as_a_word() -> None:
    data = _data()
    rs = parse_ruleset(RULES)
    result = evaluate(rs, district_indicators(data, rs), regions=data.regions, dates=data.dates,
                      region_levels=data.levels)
    sentence = result.explain(0, DAYS - 1).sentence
    assert "Wave phase growing" in sentence
    assert "threshold growing (3)" in sentence  # values and thresholds: word and code


def test_category_words_are_the_phase_labels() -> None:
    assert CATEGORIES["wave_phase"] == PHASE_LABELS


def test_wave_phase_on_the_demo_uses_nowcasts_and_matches_the_page(demo_session: Session) -> None:
    from server.services.district_data import load_district_data
    from server.services.phase_indicators import district_phase
    from tests.server.conftest import DEMO_END

    data = load_district_data(session=demo_session, start=DEMO_END - timedelta(days=149),
                              end=DEMO_END)
    rs = parse_ruleset(RULES)
    series = district_indicators(data, rs)["wave_phase"]
    # A district with fewer cases in the window than the fit needs (fit_phase's min_cases, 30)
    # has no phase (unknown); every other district has one.
    enough = np.nansum(data.district["cases"], axis=1) >= 30
    assert enough.sum() >= 10  # the demo's quiet districts are few
    assert (np.isfinite(series.estimate[:, -1]) == enough).all()
    # the last days are still being reported in most districts: there the phase is fitted on the
    # nowcast and says how many days of it it used
    assert series.nowcast is not None and series.nowcast[enough, -1].mean() >= 0.8
    flagged = series.nowcast[:, -1]
    assert series.nowcast_days is not None and (series.nowcast_days[flagged, -1] >= 1).all()
    # The page's panel fits the same counts on the same window: the same phase.
    i = data.regions.index("D03")
    panel = district_phase(session=demo_session, code="D03", end=DEMO_END)
    assert panel is not None and panel.district.phase is not None
    assert PHASE_LABELS.index(panel.district.phase_label) == series.estimate[i, -1]
