"""The moving epidemic method (server.indicators.seasonal) on hand-worked seasons.

Sources of the formulas:
- MAP curve and epidemic period: Vega et al. 2013 (Influenza Other Respir Viruses 7:546), Methods
  "the moving epidemic method" [from memory]; the exact rule as the mem R package implements it,
  read in its source (github lozalojo/mem): ``calcular.map`` (largest sum of s consecutive weeks as
  a percentage of the season), ``calcular.optimo.criterio`` (optimum = first s whose slope is
  under 2.8, minus one), ``memtiming`` (pre = weeks before the start, epi = start..end).
- n values per season: ``memmodel`` ``n.max <- max(1, round(30 / anios, 0))`` (seen).
- Epidemic threshold: upper limit of the one-sided 95 % CI of the arithmetic mean of the pooled
  pre-epidemic values (Vega et al. 2013 [from memory]; ``iconfianza.aritmetica``: mean +
  qnorm(0.95) * sd / sqrt(n), seen); "point": mean + qnorm(0.95) * sd (``iconfianza.x``, seen).
- Intensity: the same on log values, exponentiated, at 40 %, 90 %, 97.5 % (Vega et al. 2015,
  Influenza Other Respir Viruses 9:234 [from memory]; ``iconfianza.geometrica``/``logx`` with the
  +1 shift when a value is 0, seen).
Reference library: scipy.stats (norm.ppf, sem, gmean) and statsmodels (WLS) compute the same
quantities independently.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose, assert_array_equal
from scipy import stats

from server.indicators.seasonal import (
    BELOW_THRESHOLD,
    HIGH,
    LOW,
    MEDIUM,
    NO_VALUE,
    NOT_ENOUGH_SEASONS,
    VERY_HIGH,
    epidemic_timing,
    fill_inside,
    map_curve,
    mem_thresholds,
    n_values,
    season_layout,
    seasonal_intensity,
    smooth_local_linear,
)

NAN = np.nan
# Three invented seasons, each summing to 100 so the MAP curve reads in weeks' values.
A = [1, 2, 1, 10, 40, 30, 10, 3, 2, 1]
B = [2, 3, 4, 20, 50, 15, 3, 2, 1, NAN]
C = [0, 1, 5, 30, 40, 20, 3, 1, NAN, NAN]
SEASONS = np.array([[A, B, C]], dtype=float)  # (1 region, 3 seasons, 10 weeks)


def test_map_curve_hand_worked() -> None:
    # Season A: the largest run of 1 week is 40 (week 4), of 2 weeks 40+30 = 70 (weeks 4-5), of 3
    # weeks 80 (10+40+30 at weeks 3-5 ties 40+30+10 at 4-6: the earliest, week 3, is kept), of 4
    # 90 (weeks 3-6), of 5 93 (3-7), of 6 95 (3-8), of 7 96 (weeks 1-7, 2-8 and 3-9 tie:
    # week 1).
    curve = map_curve(SEASONS)
    assert_allclose(curve.percent[0, 0, :8], [0, 40, 70, 80, 90, 93, 95, 96])
    assert_array_equal(curve.start[0, 0, 1:8], [4, 4, 3, 3, 3, 3, 1])


@pytest.mark.parametrize(("season", "start", "length", "why"), [
    # A: slopes 40, 30, 10, 10, 3, 2: the first under 2.8 is the 6th -> 5 weeks from week 3
    (0, 3, 5, "A"),
    # B: curve 50, 70, 85, 89, 92, 95, 97 -> slopes 50, 20, 15, 4, 3, 3, 2: the 7th is under 2.8
    # -> 6 weeks; the best run of 6 weeks is 3+4+20+50+15+3 = 95 from week 1
    (1, 1, 6, "B"),
    # C: curve 40, 70, 90, 95, 98, 99 -> slopes ..., 5, 3, 1: 5 weeks; best 5-week run from week 2
    (2, 2, 5, "C"),
], ids=lambda v: v if isinstance(v, str) else None)
def test_epidemic_timing_hand_worked(season: int, start: int, length: int, why: str) -> None:
    t = epidemic_timing(SEASONS, smooth=False)
    assert (t.start[0, season], t.length[0, season], t.end[0, season]) == (
        start, length, start + length - 1)


def test_epidemic_timing_flat_season_is_all_epidemic_or_none() -> None:
    # A flat 10-week season adds 10 points a week: no slope under 2.8, all weeks are epidemic.
    flat = epidemic_timing(np.full((1, 1, 10), 5.0), smooth=False)
    assert (flat.start[0, 0], flat.length[0, 0]) == (0, 10)
    # With 40 flat weeks each adds 2.5 < 2.8: the first slope already fails, no epidemic.
    none = epidemic_timing(np.full((1, 1, 40), 5.0), smooth=False)
    assert none.length[0, 0] == 0


def test_season_without_epidemic_gives_no_values() -> None:
    # memtiming with the optimum at the MAP curve's row 0: start = end = 0, and R's
    # datos[-(0:n)] drops every week, so such a season adds neither pre nor epidemic values.
    # a flat 40-week season (each week adds 2.5 < 2.8 points) beside seasons A, B and C
    s = np.concatenate([np.full((1, 1, 40), 5.0),
                        np.pad(SEASONS, ((0, 0), (0, 0), (0, 30)), constant_values=NAN)], axis=1)
    th = mem_thresholds(s, smooth=False)
    assert th.seasons[0] == 4 and th.n[0] == 8  # round(30 / 4) = 7.5 -> 8
    pre = th.pre_values[0][np.isfinite(th.pre_values[0])]
    assert_allclose(np.sort(pre), [0, 1, 1, 1, 2, 2])  # only seasons A, B, C give values


@pytest.mark.parametrize(("seasons", "n"), [
    (3, 10), (4, 8),    # 30/4 = 7.5 rounds half to even -> 8 (R round, IEC 60559 [from memory])
    (7, 4), (12, 2),    # 30/12 = 2.5 -> 2
    (40, 1),            # round(0.75) = 1; never below 1
], ids=["3", "4", "7", "12", "40"])
def test_n_values_as_memmodel(seasons: int, n: int) -> None:
    assert int(n_values(seasons)) == n


def test_thresholds_hand_worked_mean_interval() -> None:
    # 3 seasons -> n = 10 per season, so every pre-epidemic and epidemic week is taken.
    # Pre-epidemic: A weeks 0-2 [1, 2, 1], B week 0 [2], C weeks 0-1 [0, 1]
    #   x = [2, 2, 1, 1, 1, 0], m = 6, mean 7/6 = 1.16667, sd = sqrt(2.83333 / 5) = 0.75277,
    #   threshold = 1.16667 + 1.64485 * 0.75277 / sqrt(6) = 1.67216 (one-sided 95 %: qnorm(0.95))
    th = mem_thresholds(SEASONS, smooth=False)
    assert_allclose(np.sort(th.pre_values[0][np.isfinite(th.pre_values[0])]), [0, 1, 1, 1, 2, 2])
    assert_allclose(th.epidemic, [1.67216], rtol=1e-5)
    x = np.array([2, 2, 1, 1, 1, 0.0])
    assert_allclose(th.epidemic, [stats.norm.ppf(0.95, loc=x.mean(), scale=stats.sem(x))])
    # Epidemic: A [10, 40, 30, 10, 3], B [3, 4, 20, 50, 15, 3], C [5, 30, 40, 20, 3]; m = 16;
    #   mean log 2.42419 (geometric mean 11.2931), sd log 1.06002, sd / sqrt(16) = 0.26501;
    #   medium exp(2.42419 - 0.25335 * 0.26501) = 10.5598, high (z 1.28155) 15.8601,
    #   very high (z 1.95996) 18.9839.
    y = np.array([10, 40, 30, 10, 3, 3, 4, 20, 50, 15, 3, 5, 30, 40, 20, 3.0])
    assert_allclose(np.sort(th.epi_values[0][np.isfinite(th.epi_values[0])]), np.sort(y))
    assert_allclose(th.intensity[0], [10.5598, 15.8601, 18.9839], rtol=1e-5)
    sem = stats.sem(np.log(y))
    assert_allclose(th.intensity[0], stats.gmean(y) * np.exp(
        stats.norm.ppf([0.40, 0.90, 0.975]) * sem))
    assert (th.seasons[0], th.n[0]) == (3, 10)


def test_thresholds_point_interval_as_mem_package_defaults() -> None:
    # i.type.threshold = 5: mean + qnorm(0.95) * sd = 1.16667 + 1.64485 * 0.75277 = 2.40487;
    # i.type.intensity = 6: exp(mean log + z * sd log): 8.6334, 43.9330, 90.1792.
    th = mem_thresholds(SEASONS, smooth=False, interval="point")
    assert_allclose(th.epidemic, [2.40487], rtol=1e-5)
    assert_allclose(th.intensity[0], [8.6334, 43.9330, 90.1792], rtol=1e-4)


def test_thresholds_shift_log_by_one_when_an_epidemic_value_is_zero() -> None:
    # Season [40, 0, 40, 20]: MAP 40, 60, 80, 100, slopes 40, 20, 20, 20 all >= 2.8, so all four
    # weeks are epidemic and a 0 is among the values: iconfianza.geometrica then takes
    # exp(CI of log(y + 1)) - 1. No pre-epidemic week: no epidemic threshold.
    s = np.array([[[40, 0, 40, 20]] * 3], dtype=float)
    th = mem_thresholds(s, smooth=False)
    y = np.array([40, 0, 40, 20] * 3, dtype=float)
    ly = np.log(y + 1)
    assert_allclose(th.intensity[0],
                    np.exp(ly.mean() + stats.norm.ppf([0.40, 0.90, 0.975]) * stats.sem(ly)) - 1)
    assert np.isnan(th.epidemic[0])


def test_thresholds_take_n_highest_per_season_with_many_seasons() -> None:
    # 12 seasons -> n = round(2.5) = 2: two pre-epidemic and two epidemic values per season.
    rng = np.random.default_rng(7)
    base = np.array([1, 2, 1, 10, 40, 30, 10, 3, 2, 1.0])
    s = (base * rng.uniform(0.8, 1.2, size=(1, 12, 10)))
    th = mem_thresholds(s, smooth=False)
    assert th.n[0] == 2
    assert np.isfinite(th.pre_values[0]).sum() == 24
    t = epidemic_timing(s, smooth=False)
    pre = [np.sort(s[0, k, : t.start[0, k]])[-2:] for k in range(12)]
    assert_allclose(np.sort(th.pre_values[0][np.isfinite(th.pre_values[0])]),
                    np.sort(np.concatenate(pre)))


def test_smoothing_matches_weighted_least_squares() -> None:
    # Local linear fit with normal kernel weights, bandwidth 1, as statsmodels WLS; negative
    # estimates are set to 0 as mem's suavizado does.
    y = np.array([0, 5, 12, 30, 55, 70, 80, 86, 90, 93, 95, 97, 98, 99, 99.5, 100.0])
    x = np.arange(y.size, dtype=float)
    wls = [sm.WLS(y, sm.add_constant(x - e), weights=np.exp(-0.5 * (x - e) ** 2)).fit().params[0]
           for e in x]
    assert_allclose(smooth_local_linear(y), np.maximum(wls, 0), atol=1e-9)


def test_smoothed_timing_is_close_to_the_raw_one() -> None:
    t = epidemic_timing(SEASONS, smooth=True)
    raw = epidemic_timing(SEASONS, smooth=False)
    assert np.all(np.abs(t.length - raw.length) <= 1)


def test_fill_inside_interpolates_inner_gaps_only() -> None:
    v = np.array([[NAN, 1, NAN, 3, NAN, NAN, 9, NAN]])
    assert_allclose(fill_inside(v), [[NAN, 1, 2, 3, 5, 7, 9, NAN]])


def test_missing_inner_week_is_filled_before_timing() -> None:
    # Week 5 of season A (30) missing: filled with (40 + 10) / 2 = 25; the epidemic stays.
    s = SEASONS.copy()
    s[0, 0, 5] = NAN
    t = epidemic_timing(fill_inside(s), smooth=False)
    th = mem_thresholds(s, smooth=False)
    assert t.length[0, 0] >= 4
    assert 25 in th.epi_values[0]


# ---------------------------------------------------------------- calendar and levels


def _mondays(first: str, n: int) -> np.ndarray:
    return np.datetime64(first) + 7 * np.arange(n).astype("timedelta64[D]")


def test_season_layout_iso_weeks_40_to_20() -> None:
    # ISO week 40 of 2020 begins on Monday 28 Sep 2020 and week 20 of 2021 ends on Sunday
    # 23 May 2021 (ISO 8601; datetime.date.fromisocalendar); 2020 has 53 ISO weeks, so the season
    # has 13 + 1 + 20 = 34 weeks.
    weeks = _mondays("2020-09-21", 40)
    lay = season_layout(weeks)
    assert lay.season[0] == -1 and lay.position[1] == 0
    in_season = lay.season == lay.season[1]
    assert in_season.sum() == 34
    assert str(weeks[in_season][-1]) == "2021-05-17"


def _weekly_years(n_seasons: int, *, rng: np.random.Generator, scale: float = 1.0) -> tuple:
    weeks = _mondays("2014-09-29", 52 * n_seasons + 20)  # ISO week 40 of 2014
    lay = season_layout(weeks)
    shape = np.exp(-0.5 * ((lay.position - 16) / 3.0) ** 2)
    mean = np.where(lay.season >= 0, 5 + 200 * shape, 5)
    return weeks, lay, rng.poisson(scale * mean).astype(float)


def test_not_enough_seasons_before_three_complete_past_seasons() -> None:
    weeks, lay, y = _weekly_years(5, rng=np.random.default_rng(3))
    res = seasonal_intensity(y[None, :], weeks)
    first = lay.season[lay.season >= 0].min()
    for k, expected in ((first, 0), (first + 1, 1), (first + 2, 2), (first + 3, 3)):
        wk = lay.season == k
        if expected < 3:
            assert np.all(res.state[0, wk] == NOT_ENOUGH_SEASONS), k
            assert np.all(np.isnan(res.level[0, wk]))
        else:
            assert np.all(res.state[0, wk] >= BELOW_THRESHOLD), k
            assert np.all(res.seasons[0, wk] == 3)


def test_levels_follow_the_thresholds() -> None:
    weeks, lay, y = _weekly_years(6, rng=np.random.default_rng(5))
    res = seasonal_intensity(y[None, :], weeks)
    ok = res.state[0] >= 0
    w = y[ok]
    expect = np.select(
        [w < res.epidemic[0, ok], w < res.medium[0, ok], w < res.high[0, ok],
         w < res.very_high[0, ok]], [BELOW_THRESHOLD, LOW, MEDIUM, HIGH], VERY_HIGH)
    assert_array_equal(res.state[0, ok], expect)
    # every week of the last (partial) season is judged against all 6 seasons before it, pooled
    last = lay.season == lay.season.max()
    past = lay.season.max() - lay.season[lay.season >= 0].min()
    assert past == 6
    assert np.all(res.seasons[0, last & ok] == past)
    # the thresholds equal mem_thresholds on exactly those seasons
    grid = np.full((1, lay.season.max() + 1, lay.length), NAN)
    grid[0, lay.season[lay.season >= 0], lay.position[lay.season >= 0]] = y[lay.season >= 0]
    use = np.zeros((1, grid.shape[1]), bool)
    use[0, lay.season.max() - past: lay.season.max()] = True
    th = mem_thresholds(grid, use=use)
    i = np.flatnonzero(last & ok)[0]
    assert_allclose([res.epidemic[0, i], res.medium[0, i], res.high[0, i], res.very_high[0, i]],
                    [th.epidemic[0], *th.intensity[0]])


def test_many_regions_at_once_equal_one_at_a_time() -> None:
    rng = np.random.default_rng(11)
    weeks, _lay, y1 = _weekly_years(5, rng=rng)
    _, _, y2 = _weekly_years(5, rng=rng, scale=3.0)
    both = seasonal_intensity(np.vstack([y1, y2]), weeks)
    one = seasonal_intensity(y2[None, :], weeks)
    assert_array_equal(both.state[1], one.state[0])
    assert_allclose(both.epidemic[1], one.epidemic[0])


def test_missing_weeks_are_no_value_and_do_not_break_the_baseline() -> None:
    weeks, lay, y = _weekly_years(5, rng=np.random.default_rng(13))
    holed = y.copy()
    first = lay.season[lay.season >= 0].min()
    inner = np.flatnonzero((lay.season == first) & (lay.position == 10))
    holed[inner] = NAN  # one inner week of the first season
    holed[-3] = NAN  # a current week
    res = seasonal_intensity(holed[None, :], weeks)
    assert res.state[0, -3] == NO_VALUE
    assert np.isfinite(res.epidemic[0, -1])
    # a whole missing past season is not usable: the baseline skips it
    gone = y.copy()
    gone[lay.season == first + 1] = NAN
    res2 = seasonal_intensity(gone[None, :], weeks)
    last = lay.season == lay.season.max()
    assert np.all(res.seasons[0, last] == 5)  # the season with a hole still counts
    assert np.all(res2.seasons[0, last] == 4)


def test_bad_calendar_is_refused() -> None:
    with pytest.raises(ValueError, match="consecutive Mondays"):
        seasonal_intensity(np.zeros((1, 2)), np.array(["2020-01-07", "2020-01-14"],
                                                      dtype="datetime64[D]"))
    with pytest.raises(ValueError, match="start_week"):
        season_layout(_mondays("2020-01-06", 3), start_week=60)


def _mem_by_the_r_steps(seasons: list[np.ndarray]) -> tuple[float, np.ndarray]:
    """One region, season by season, as the mem source's loops read (no vectorising): the MAP
    curve by explicit window sums (calcular.map), statsmodels WLS for the smoothing (suavizado),
    the slope rule (calcular.optimo.criterio), max.n.valores and the mean-CI limits with scipy."""
    n = max(1, round(30 / len(seasons)))
    pre_all, epi_all = [], []
    for x in seasons:
        w = len(x)
        best, start = [0.0], [0]
        for s in range(1, w + 1):
            sums = [x[i:i + s].sum() for i in range(w - s + 1)]
            best.append(max(sums))
            start.append(sums.index(max(sums)))
        pct = 100 * np.array(best) / x.sum()
        t = np.arange(w + 1.0)
        smooth = np.maximum([sm.WLS(pct, sm.add_constant(t - e),
                                    weights=np.exp(-0.5 * (t - e) ** 2)).fit().params[0]
                             for e in t], 0)
        slope = np.diff(smooth)
        under = [s for s in range(1, w + 1) if slope[s - 1] < 2.8]
        length = (min(under) - 1) if under else w
        if length == 0:
            continue
        a = start[length]
        pre_all += sorted(x[:a], reverse=True)[:n]
        epi_all += sorted(x[a:a + length], reverse=True)[:n]
    pre, epi = np.array(pre_all), np.log(np.array(epi_all))
    threshold = stats.norm.ppf(0.95, loc=pre.mean(), scale=stats.sem(pre))
    levels = np.exp(stats.norm.ppf([0.40, 0.90, 0.975], loc=epi.mean(), scale=stats.sem(epi)))
    return float(threshold), levels


@pytest.mark.parametrize("seed", range(6))
def test_many_regions_equal_the_r_steps_one_season_at_a_time(seed: int) -> None:
    rng = np.random.default_rng(100 + seed)
    n_seasons = int(rng.integers(3, 13))
    t = np.arange(30)
    peak = 12 + rng.normal(0, 3, size=(4, n_seasons, 1))
    height = 200 * np.exp(rng.normal(0, 0.5, size=(4, n_seasons, 1)))
    s = rng.poisson(8 + height * np.exp(-0.5 * ((t - peak) / 2.5) ** 2)).astype(float)
    th = mem_thresholds(s)
    for r in range(4):
        threshold, levels = _mem_by_the_r_steps(list(s[r]))
        assert_allclose(th.epidemic[r], threshold, rtol=1e-10)
        assert_allclose(th.intensity[r], levels, rtol=1e-10)
