"""Tests for the scenario contract and its epidemiological shape (demo_seed.scenario)."""

from __future__ import annotations

from datetime import date, datetime, timedelta

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy.signal import find_peaks

from demo_seed.errors import ScenarioArgumentError
from demo_seed.geography import build_geography
from demo_seed.scenario import MEASURES, Scenario, build_scenario

END = date(2030, 11, 30)   # invented fixed end date
NAMES = ["cases", "tests", "positives", "hosp_admissions", "icu_occupied", "icu_staffed",
         "ward_occupied", "ward_staffed", "ww_concentration", "ww_flow", "ww_marker", "gp_ari"]


@pytest.fixture(scope="module")
def scenario() -> Scenario:
    return build_scenario(seed=7, end=END)


@pytest.fixture(scope="module")
def obs(scenario: Scenario) -> pd.DataFrame:
    return scenario.observations


def _final(obs: pd.DataFrame, measure: str) -> pd.DataFrame:
    """Last known value per (ref_date, region) as a wide frame."""
    rows = obs[obs["measure"] == measure].sort_values("known_on")
    last = rows.groupby(["ref_date", "region"])["value"].last()
    return last.unstack("region")


def test_build_scenario_deterministic(obs: pd.DataFrame) -> None:
    again = build_scenario(seed=7, end=END).observations
    pd.testing.assert_frame_equal(obs, again)


def test_build_scenario_other_seed_differs(obs: pd.DataFrame) -> None:
    other = build_scenario(seed=8, end=END).observations
    assert not (len(other) == len(obs) and np.array_equal(other["value"], obs["value"]))


def test_build_scenario_columns_and_dtypes(obs: pd.DataFrame) -> None:
    assert list(obs.columns) == ["region", "measure", "ref_date", "value", "known_on"]
    assert obs["value"].dtype == np.float64
    assert pd.api.types.is_datetime64_any_dtype(obs["ref_date"])
    assert pd.api.types.is_datetime64_any_dtype(obs["known_on"])
    assert all(isinstance(v, str) for v in obs["region"].head(50))


def test_build_scenario_measure_names_exact(obs: pd.DataFrame) -> None:
    assert sorted(MEASURES) == sorted(NAMES)
    assert sorted(obs["measure"].unique()) == sorted(NAMES)


def test_measures_spec_fields() -> None:
    for spec in MEASURES.values():
        assert set(spec) == {"unit", "kind", "aggregation", "description"}
        assert spec["kind"] in {"count", "level", "concentration"}
        assert spec["aggregation"] in {"sum", "mean", "none"}


def test_build_scenario_values_finite_and_non_negative(obs: pd.DataFrame) -> None:
    assert np.all(np.isfinite(obs["value"])) and np.all(obs["value"] >= 0)


def test_build_scenario_positives_not_above_tests(obs: pd.DataFrame) -> None:
    pos, tests = _final(obs, "positives"), _final(obs, "tests")
    assert pos.shape == tests.shape and np.all(pos.to_numpy() <= tests.to_numpy())


def test_build_scenario_known_on_window(scenario: Scenario, obs: pd.DataFrame) -> None:
    assert np.all(obs["known_on"] >= obs["ref_date"])
    assert obs["known_on"].max() == pd.Timestamp(scenario.end)
    assert obs["ref_date"].min() == pd.Timestamp(scenario.start)
    assert (scenario.end - scenario.start).days == 547


def test_build_scenario_every_day_is_a_vintage(scenario: Scenario, obs: pd.DataFrame) -> None:
    assert obs["known_on"].nunique() == 548


def test_build_scenario_cases_revise_upward_only(obs: pd.DataFrame) -> None:
    cases = obs[obs["measure"] == "cases"].sort_values(["region", "ref_date", "known_on"])
    step = cases.groupby(["region", "ref_date"])["value"].diff().dropna()
    # only changed values are rows, and case counts only grow
    assert step.size > 0 and np.all(step > 0)


def test_build_scenario_recent_cases_revised_in_later_vintages(obs: pd.DataFrame) -> None:
    cases = obs[obs["measure"] == "cases"]
    per_key = cases.groupby(["region", "ref_date"]).size()
    assert (per_key > 1).mean() > 0.5


def test_build_scenario_one_row_per_key_and_vintage(obs: pd.DataFrame) -> None:
    keys = ["region", "measure", "ref_date", "known_on"]
    assert not obs.duplicated(keys).any()


def test_build_scenario_non_case_measures_final_on_first_report(obs: pd.DataFrame) -> None:
    other = obs[obs["measure"] != "cases"]
    assert not other.duplicated(["region", "measure", "ref_date"]).any()


def test_build_scenario_row_count_modest(obs: pd.DataFrame) -> None:
    assert len(obs) < 400_000


def test_build_scenario_region_order(scenario: Scenario) -> None:
    levels = [r.level for r in scenario.regions]
    assert levels == ["county"] + ["region"] * 3 + ["district"] * 14 + ["plant"] * 5
    codes = {r.code for r in scenario.regions}
    assert all(r.parent is None or r.parent in codes for r in scenario.regions)
    assert all(r.attributes.get("kind") == "wastewater_plant"
               for r in scenario.regions if r.level == "plant")


def test_build_scenario_measures_on_right_levels(scenario: Scenario, obs: pd.DataFrame) -> None:
    level = {r.code: r.level for r in scenario.regions}
    seen = obs.assign(level=obs["region"].map(level)).groupby("measure")["level"].unique()
    assert set(seen["icu_occupied"]) == {"region"}
    assert set(seen["ww_concentration"]) == {"plant"}
    assert set(seen["cases"]) == {"district"}


def test_build_scenario_truth_shapes(scenario: Scenario) -> None:
    truth = scenario.truth
    assert truth.infections.shape == truth.rt.shape == (14, 548)
    assert truth.dates[0] == np.datetime64(scenario.start)
    assert_allclose(truth.generation_interval.sum(), 1.0)


def test_build_scenario_truth_follows_renewal_equation(scenario: Scenario) -> None:
    truth = scenario.truth
    w = truth.generation_interval
    lam = np.zeros_like(truth.infections)
    for s, ws in enumerate(w, start=1):
        lam[:, s:] += ws * truth.infections[:, :-s]
    total = truth.infections.sum(axis=0)
    expected = (truth.rt * lam).sum(axis=0)
    busy = total > 300
    # renewal equation (Fraser 2007, PLoS ONE 2:e758; Cori et al. 2013, Am J Epidemiol):
    # I_t = R_t sum_s w_s I_{t-s}; local-mixing R_t and noise allow a few per cent
    assert_allclose(np.median(total[busy] / expected[busy]), 1.0, atol=0.05)


def test_build_scenario_policy_and_testing_dates(scenario: Scenario) -> None:
    days = [d for d, _ in scenario.policy_dates]
    assert 3 <= len(days) <= 4 and days == sorted(days)
    assert scenario.start < days[0] and days[-1] <= scenario.end
    assert scenario.start < scenario.testing_change < scenario.end


def _waves(scenario: Scenario) -> np.ndarray:
    total = scenario.truth.infections.sum(axis=0)
    smooth = np.convolve(total, np.ones(21) / 21, mode="same")
    peaks, _ = find_peaks(smooth, prominence=0.3 * smooth.max(), distance=60)
    return peaks


@pytest.mark.parametrize("end", [date(2030, 11, 30), date(2031, 5, 15), date(2031, 8, 20),
                                 date(2032, 2, 10)], ids=["nov", "may", "aug", "feb"])
def test_build_scenario_has_at_least_two_waves(end: date) -> None:
    # scipy.signal.find_peaks with a prominence of 30 % of the highest peak: each wave is
    # separated from the next by a trough
    assert _waves(build_scenario(seed=7, end=end)).size >= 2


def test_build_scenario_wastewater_leads_cases(scenario: Scenario, obs: pd.DataFrame) -> None:
    days = pd.date_range(scenario.start, scenario.end)
    geo = build_geography()
    conc = _final(obs, "ww_concentration").reindex(days)
    marker = _final(obs, "ww_marker").reindex(days)
    log_ww = np.log(conc / marker).interpolate(limit_area="inside").mean(axis=1)
    log_ww = log_ww.rolling(7, center=True).mean()
    cases = _final(obs, "cases").reindex(days)[list(geo.district_codes)]
    served_cases = pd.Series(cases.to_numpy() @ geo.catchment_matrix().sum(axis=0), index=days)
    log_cases = np.log(served_cases.rolling(7, center=True).mean() + 1.0)
    lags = np.arange(-7, 22)
    corr = [log_ww.corr(log_cases.shift(-k)) for k in lags]
    # positive lag: wastewater today matches cases k days later. Published leads over cases
    # by specimen date are 0-2 (Peccia et al. 2020) to 4-5 days (Olesen et al. 2021 review)
    assert 2 <= lags[int(np.nanargmax(corr))] <= 10


def test_build_scenario_icu_reaches_high_occupancy(obs: pd.DataFrame) -> None:
    ratio = (_final(obs, "icu_occupied") / _final(obs, "icu_staffed")).max()
    assert ratio.max() >= 0.7 and np.all(ratio <= 1.0)


def test_build_scenario_ward_census_follows_admissions_and_little_law(
        obs: pd.DataFrame) -> None:
    # Little's law (Little 1961, Oper Res 9:383): over the whole run the mean general-bed
    # census equals the mean daily admissions times the mean stay in census days (log-normal,
    # median 6, sigma 0.6: mean about exp(0.18) x 6 + 1/2 = 7.7 days), up to the ends.
    from demo_seed.delays import discretised_lognormal
    from demo_seed.observation import WARD_LOS_MEDIAN, WARD_LOS_SIGMA

    los = discretised_lognormal(WARD_LOS_MEDIAN, WARD_LOS_SIGMA, max_lag=45)
    mean_stay = float(np.sum(np.arange(los.size) * los) + los[0])
    ward = _final(obs, "ward_occupied").sum(axis=1)
    admissions = _final(obs, "hosp_admissions").sum(axis=1)
    inner = slice(60, -60)
    assert abs(ward.iloc[inner].mean() / (admissions.iloc[inner].mean() * mean_stay) - 1) < 0.05
    share = (_final(obs, "ward_occupied") / _final(obs, "ward_staffed")).max()
    assert 0.2 < share.max() < 1.0


def test_build_scenario_testing_change_raises_tests(scenario: Scenario,
                                                    obs: pd.DataFrame) -> None:
    tests = _final(obs, "tests").sum(axis=1)
    pos = _final(obs, "positives").sum(axis=1)
    change = pd.Timestamp(scenario.testing_change)
    before = slice(change - timedelta(days=28), change - timedelta(days=1))
    after = slice(change, change + timedelta(days=27))
    assert tests[after].sum() > 1.5 * tests[before].sum()
    positivity_before = pos[before].sum() / tests[before].sum()
    assert pos[after].sum() / tests[after].sum() < positivity_before * 1.2


def test_build_scenario_default_end_is_yesterday() -> None:
    sc = build_scenario(seed=1, days=150)
    assert sc.end == date.today() - timedelta(days=1)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [({"seed": -1}, "seed=-1"), ({"end": datetime(2030, 1, 1)}, "end=datetime"),
     ({"days": 10}, "days=10"), ({"seed": True}, "seed=True")],
    ids=["negative_seed", "datetime_end", "short", "bool_seed"],
)
def test_build_scenario_bad_argument_raises(kwargs: dict, message: str) -> None:
    with pytest.raises(ScenarioArgumentError, match=message):
        build_scenario(**kwargs)


def test_build_scenario_records_transmission_and_testing_truth(scenario) -> None:  # type: ignore[no-untyped-def]
    from demo_seed.storyline import POLICIES

    changes = scenario.truth.transmission_changes
    assert [c.date for c in changes] == [d for d, _ in scenario.policy_dates]
    levels = [1.0, *(p.level for p in POLICIES)]
    assert [c.ratio for c in changes] == pytest.approx(
        [b / a for a, b in zip(levels, levels[1:], strict=False)])
    truth = scenario.testing_change_truth
    assert scenario.start + timedelta(days=truth.index) == scenario.testing_change
    assert truth.case_ratio == pytest.approx(0.45 / 0.28)
