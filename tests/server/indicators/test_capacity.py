"""Unit tests for server.indicators.capacity: projections, count draws, forecast shape."""

from __future__ import annotations

from datetime import date

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import optimize, stats

from server.indicators.capacity import (
    HISTORY_DAYS,
    TARGETS,
    Scenario,
    capacity_forecasts,
    count_draws,
    expected_occupancy,
    projected_share,
)
from server.indicators.hospital import length_of_stay
from server.indicators.quantile_forecast import QuantileForecast

H = 21
SCENARIOS = {
    "trend": Scenario(name="trend"),
    "levels-off": Scenario(name="levels-off", kind="growth_to", value=0.0, within_days=7),
    "to-minus": Scenario(name="to-minus", kind="growth_to", value=-0.03, within_days=10),
    "halves": Scenario(name="halves", kind="change", value=0.5, within_days=14),
    "doubles": Scenario(name="doubles", kind="change", value=2.0, within_days=5),
}


def _log_path(sc: Scenario, r: float) -> np.ndarray:
    """Cumulative log growth of admissions on days 1..H, written out from the scenario's
    definition day by day (independently of Scenario.log_multiplier)."""
    total, out = 0.0, []
    for h in range(1, H + 1):
        if sc.kind == "trend":
            rate = r
        elif sc.kind == "growth_to":
            rate = r + (sc.value - r) * min(h / sc.within_days, 1.0)
        else:
            rate = np.log(sc.value) / sc.within_days if h <= sc.within_days else 0.0
        total += rate
        out.append(total)
    return np.array(out)


def _scipy_dist(distribution: str, median: float, q1: float, q3: float):  # type: ignore[no-untyped-def]
    if distribution == "lognormal":  # sigma from the quartile ratio, Rees et al. 2020 fit
        return stats.lognorm(s=np.log(q3 / q1) / (2 * stats.norm.ppf(0.75)), scale=median)
    shape = optimize.brentq(
        lambda k: stats.gamma(k).ppf(0.75) / stats.gamma(k).ppf(0.25) - q3 / q1, 0.05, 1e4)
    return stats.gamma(shape, scale=median / stats.gamma(shape).ppf(0.5))


@pytest.mark.parametrize("scenario", list(SCENARIOS), ids=list(SCENARIOS))
@pytest.mark.parametrize("r", [-0.06, 0.0, 0.04, 0.11], ids=["r-0.06", "r0", "r0.04", "r0.11"])
@pytest.mark.parametrize(("distribution", "median", "q1", "q3"),
                         [("lognormal", 8.0, 5.0, 13.0), ("gamma", 7.0, 4.0, 11.0)],
                         ids=["lognormal-8", "gamma-7"])
def test_expected_occupancy_equals_direct_convolution_with_scipy_survival(
    scenario: str, r: float, distribution: str, median: float, q1: float, q3: float
) -> None:
    # Reference: admissions over HISTORY_DAYS days of growth at r, then the scenario, convolved
    # (numpy.convolve) with the survival P(X > k) of the scipy distribution: a patient admitted
    # on day s is in a bed on day s + k when the continuous stay X exceeds k (L = ceil X).
    sc = SCENARIOS[scenario]
    dist = _scipy_dist(distribution, median, q1, q3)
    los = length_of_stay(distribution=distribution, median=median, quartiles=(q1, q3))
    j = np.arange(HISTORY_DAYS)[::-1]  # days -59..0 as lags j = 59..0
    admissions = np.concatenate([np.exp(-r * j), np.exp(_log_path(sc, r))])
    survival = dist.sf(np.arange(admissions.size))
    census = np.convolve(admissions, survival)[HISTORY_DAYS - 1: HISTORY_DAYS + H]
    o0 = 37.0
    got = expected_occupancy(o0, r, sc, los, H)
    assert_allclose(got.total, o0 * census / census[0], rtol=1e-6)
    assert_allclose(got.admissions[0], o0 / census[0], rtol=1e-6)


@pytest.mark.parametrize("r", [-0.05, 0.03, 0.1])
def test_trend_census_grows_at_the_growth_rate(r: float) -> None:
    # Wallinga & Lipsitch (2007), Proc R Soc B 274:599: in a phase of exponential growth every
    # prevalence grows at the incidence's rate r (stays of at most 30 days, all inside history).
    los = length_of_stay(max_days=30)
    got = expected_occupancy(50.0, r, SCENARIOS["trend"], los, H).total
    assert_allclose(got, 50.0 * np.exp(r * np.arange(H + 1)), rtol=1e-12)


def test_steady_admissions_keep_the_census_and_obey_littles_law() -> None:
    # Little (1961), Oper Res 9:383: census = admission rate x mean stay, held when steady.
    los = length_of_stay(max_days=40)
    got = expected_occupancy(30.0, 0.0, SCENARIOS["trend"], los, H)
    assert_allclose(got.total, 30.0, rtol=1e-12)
    assert_allclose(got.admissions[0], 30.0 / los.mean, rtol=1e-12)


@pytest.mark.parametrize("lam", [15.0, 22.5, 60.0, 400.0, 5000.0])
def test_count_draws_match_poisson_quantiles(lam: float) -> None:
    # scipy.stats.poisson.ppf as the reference; the Cornish-Fisher draw at z = Phi^-1(p) must
    # give the p-quantile to within one count (Cornish & Fisher 1937).
    p = np.array([0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95])
    z = stats.norm.ppf(p)
    mean = np.full(p.shape, lam)
    got = count_draws(np.random.default_rng(0), mean, mean, mean, z)
    assert np.abs(got - stats.poisson.ppf(p, lam)).max() <= 1


@pytest.mark.parametrize("lam", [2.0, 3.5, 7.0, 15.0, 40.0])
def test_count_draws_follow_the_poisson_pmf(lam: float) -> None:
    # scipy.stats.poisson.pmf as the reference: the draws at evenly spread normal quantiles are
    # within 0.01 of the Poisson distribution in total variation.
    z = stats.norm.ppf((np.arange(400_000) + 0.5) / 400_000)
    mean = np.full(z.shape, lam)
    got = count_draws(np.random.default_rng(0), mean, mean, mean, z).astype(np.int64)
    k = np.arange(int(lam * 5 + 30))
    freq = np.bincount(got, minlength=k.size)[: k.size] / z.size
    assert 0.5 * np.abs(freq - stats.poisson.pmf(k, lam)).sum() < 0.01


def test_count_draws_match_binomial_plus_poisson_quantiles() -> None:
    # Reference: the exact distribution of Binomial(40, 0.6) + Poisson(20) by convolving the
    # scipy pmfs; today's patients still in a bed plus new admissions still in a bed.
    n, p, new = 40, 0.6, 20.0
    pmf = np.convolve(stats.binom.pmf(np.arange(n + 1), n, p),
                      stats.poisson.pmf(np.arange(120), new))
    cdf = np.cumsum(pmf)
    q = np.array([0.05, 0.25, 0.5, 0.75, 0.95])
    exact = np.searchsorted(cdf, q)
    cur = n * p
    mean = np.full(q.shape, cur + new)
    var = np.full(q.shape, cur * (1 - p) + new)
    third = np.full(q.shape, cur * (1 - p) * (1 - 2 * p) + new)
    got = count_draws(np.random.default_rng(0), mean, var, third, stats.norm.ppf(q))
    assert np.abs(got - exact).max() <= 1


def test_days_to_share_under_the_trend_follow_the_exponential() -> None:
    # With O_h = O_0 e^{rh} the share theta is first reached on day ceil(ln(theta B / O_0) / r).
    los = length_of_stay(max_days=30)
    occ = np.array([[20.0, 40.0, 60.0, 90.0]])
    staffed = np.full((1, 4), 100.0)
    r = np.array([[0.05, 0.05, 0.02, 0.0]])
    got = projected_share(occ, staffed, r, np.zeros((1, 4)), scenario=SCENARIOS["trend"],
                          los=los, horizon=21, threshold=85.0)
    expected = np.ceil(np.log(85.0 / occ[0, :3]) / r[0, :3])
    expected = np.where(expected > 21, np.inf, expected)
    assert_allclose(got.days_estimate[0, :3], expected)
    assert got.days_estimate[0, 3] == 0  # 90 % today: reached already
    assert_allclose(got.share_estimate[0, 0], 100 * 0.2 * np.exp(0.05 * 21))


def test_projected_share_interval_widens_with_the_growth_rate_error() -> None:
    los = length_of_stay()
    occ, staffed = np.full((1, 2), 40.0), np.full((1, 2), 100.0)
    got = projected_share(occ, staffed, np.full((1, 2), 0.03), np.array([[0.0, 0.02]]),
                          scenario=SCENARIOS["trend"], los=los, horizon=14)
    assert got.share_lower[0, 0] == pytest.approx(got.share_upper[0, 0])
    assert got.share_lower[0, 1] < got.share_estimate[0, 1] < got.share_upper[0, 1]
    assert got.days_lower[0, 1] <= got.days_estimate[0, 1] <= got.days_upper[0, 1]


def test_projected_share_is_nan_without_staffed_beds() -> None:
    got = projected_share([[10.0]], [[0.0]], [[0.01]], [[0.01]], scenario=SCENARIOS["trend"],
                          los=length_of_stay(), horizon=7)
    assert np.isnan(got.share_estimate).all() and np.isnan(got.days_estimate).all()


def _inputs(n: int = 6) -> dict[str, object]:
    rng = np.random.default_rng(3)
    adm = rng.poisson(12 * np.exp(0.03 * np.arange(28)), (n, 28)).astype(float)
    return {"admissions": adm, "regions": [f"A{i}" for i in range(n)],
            "origin": date(2030, 3, 1), "scenarios": list(SCENARIOS.values())[:3]}


def test_capacity_forecasts_give_one_quantile_forecast_per_target_and_scenario() -> None:
    occ = np.array([10.0, 20, 30, np.nan, 5, 50])
    res = capacity_forecasts(**_inputs(), occupied=occ, staffed=np.full(6, 60.0), sims=100)
    assert len(res.forecasts) == 3 * len(TARGETS)
    f = res.forecast("icu_share", "trend")
    assert isinstance(f, QuantileForecast)
    assert f.values.shape == (6, H, 5)
    assert (np.diff(f.values[[0, 1, 2, 4, 5]], axis=-1) >= 0).all()
    assert np.isnan(f.values[3]).all()  # no census: no capacity forecast
    assert np.isfinite(res.forecast("hosp_admissions", "trend").values[3]).all()
    assert_allclose(f.values, 100 * res.forecast("icu_occupied", "trend").values / 60.0)
    crossing = res.crossing("trend", 85.0)
    assert crossing.lower[5] <= crossing.estimate[5] <= crossing.upper[5]


def test_general_beds_are_forecast_as_ward_targets_with_their_own_length_of_stay() -> None:
    # The same census model for general beds: targets ward_occupied / ward_share, with the
    # length of stay passed (median 5 days, quartiles 3 and 9: invented for the check). The
    # simulated median follows the expected census at the fitted growth rate under that stay
    # (expected_occupancy, checked against scipy in this file), not under the ICU stay. A
    # changing growth rate (here to -3 % a day within 10 days) is what makes the stay matter:
    # under a constant rate every census grows at that rate whatever the stay.
    occ, staffed = np.full(6, 40.0), np.full(6, 100.0)
    short = length_of_stay(median=5.0, quartiles=(3.0, 9.0))
    ward = capacity_forecasts(**_inputs(), occupied=occ, staffed=staffed, sims=2000, beds="ward",
                              los=short)
    assert {f.target for f in ward.forecasts} == {"hosp_admissions", "ward_occupied",
                                                   "ward_share"}
    median = ward.forecast("ward_occupied", "to-minus").median()[:, 13]
    sc = SCENARIOS["to-minus"]
    expected = expected_occupancy(occ, ward.growth, sc, short, 14).total[:, 14]
    under_icu_stay = expected_occupancy(occ, ward.growth, sc, length_of_stay(), 14).total[:, 14]
    assert np.all(np.abs(under_icu_stay - expected) > 2)
    assert_allclose(median, expected, rtol=0.06)
    assert np.all(np.abs(median - expected) < np.abs(median - under_icu_stay))
    assert_allclose(ward.forecast("ward_share", "trend").values,
                    100 * ward.forecast("ward_occupied", "trend").values / 100.0)
    with pytest.raises(ValueError, match="beds"):
        capacity_forecasts(**_inputs(), occupied=occ, staffed=staffed, sims=50, beds="maternity")


def test_capacity_forecasts_are_reproducible_from_the_seed() -> None:
    a = capacity_forecasts(**_inputs(), sims=50, seed=4).forecast("hosp_admissions", "trend")
    b = capacity_forecasts(**_inputs(), sims=50, seed=4).forecast("hosp_admissions", "trend")
    assert_allclose(a.values, b.values)


def test_capacity_forecasts_without_capacity_forecast_admissions_only() -> None:
    res = capacity_forecasts(**_inputs(), sims=50)
    assert {f.target for f in res.forecasts} == {"hosp_admissions"}
    assert res.days_to_share == ()


def test_halving_scenario_ends_at_half_the_level() -> None:
    path = SCENARIOS["halves"].log_multiplier(np.array([0.05]), H)
    assert_allclose(np.exp(path[0, 13]), 0.5)
    assert_allclose(np.exp(path[0, 20]), 0.5)


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"kind": "change", "value": 0.0}, "value"),
    ({"kind": "sideways"}, "kind"),
    ({"within_days": 0}, "within_days"),
])
def test_scenario_refuses_bad_definitions(kwargs: dict[str, object], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        Scenario(name="x", **kwargs)  # type: ignore[arg-type]


def test_shrunk_growth_is_the_normal_posterior() -> None:
    # The posterior of a normal likelihood N(r_hat, se^2) and a normal prior N(0, tau^2) is
    # normal with the precision-weighted mean and variance (Gelman et al. 2013, Bayesian Data
    # Analysis, 3rd ed., eq. 2.12, from memory); checked here by numerical integration (scipy).
    from scipy import integrate

    from server.indicators.capacity import GROWTH_PRIOR_SD, shrunk_growth

    for r_hat, se in [(0.12, 0.01), (0.3, 0.2), (-0.25, 0.15), (0.0, 0.05)]:
        def density(r: float, r_hat: float = r_hat, se: float = se) -> float:
            return float(stats.norm.pdf(r, r_hat, se) * stats.norm.pdf(r, 0.0, GROWTH_PRIOR_SD))

        mass = integrate.quad(density, -2, 2, points=[0.0, r_hat])[0]
        mean = integrate.quad(lambda r: r * density(r), -2, 2, points=[0.0, r_hat])[0] / mass
        second = integrate.quad(lambda r: r * r * density(r), -2, 2, points=[0.0, r_hat])[0]
        var = second / mass - mean**2
        got_r, got_se = shrunk_growth(np.array([r_hat]), np.array([se]))
        assert got_r[0] == pytest.approx(mean, abs=1e-9)
        assert got_se[0] == pytest.approx(np.sqrt(var), rel=1e-6)
