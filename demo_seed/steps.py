"""A scenario with clean step changes, for checking change-point methods against known truth.

All names, places and numbers are invented.

Independent regions (no mixing, no importations, no season, no variant, no behavioural
response) run the chain-binomial SEIR of :mod:`demo_seed.epidemic` with a transmission rate
that is piecewise constant: each region has one to three steps of known date and size. About
half the regions also get the testing-policy change of :mod:`demo_seed.observation` (wider
testing: ascertainment and negative tests step up) on a known test date. Cases, tests and
positives come from the demo's own observation models, and so do hospital admissions and a
sampled wastewater concentration per region (one plant each; own random streams, so adding
them changed none of the other series). A burn-in at the first reproduction number runs before
day 0, so the series start in steady exponential growth or decline.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize

from demo_seed.delays import discretised_gamma, mean_of_pmf
from demo_seed.epidemic import generation_interval_pmf, simulate_seir
from demo_seed.errors import ScenarioArgumentError
from demo_seed.observation import (
    INFECTION_TO_ADMISSION,
    INFECTION_TO_TEST,
    AscertainmentChange,
    case_reports,
    hospital_admissions,
    lab_tests,
)
from demo_seed.observation import testing_change as testing_change_at
from demo_seed.wastewater import SHEDDING
from demo_seed.wastewater import wastewater as simulate_wastewater

__all__ = ["StepScenario", "growth_from_reproduction", "simulate_steps"]

LATENT_MEAN, INFECTIOUS_MEAN = 3.0, 4.0
GENERATION_MEAN = LATENT_MEAN + INFECTIOUS_MEAN
BURN_IN = 60
BAND = 3.0  # steps steer incidence back when it has drifted by more than this factor
R_RANGE = (0.75, 1.3)
START = np.datetime64("2031-03-03")  # a Monday; invented calendar
#: People served by each region's plant per person of the region: the regions are large (so
#: that susceptibles barely deplete) and their incidence per person small; a plant serving a
#: hundredth of them at the same infections keeps concentrations well above the detection
#: limit, as a plant in a smaller place would be (invented).
PLANT_SERVES = 0.01


@dataclass(frozen=True)
class StepScenario:
    """Simulated series and their truth; arrays shaped (regions, days) unless noted.

    Attributes
    ----------
    dates : ndarray of datetime64[D], shape (days,)
    population : ndarray, shape (regions,)
    infections, cases, tests, positives : ndarray
    change_day : ndarray of int, shape (regions, 3)
        Infection-time day of each transmission step (-1 where none).
    change_ratio : ndarray, shape (regions, 3)
        R after / R before at each step (NaN where none).
    reproduction : ndarray
        Nominal R of each day (the transmission rate times the infectious period), before
        depletion of susceptibles.
    growth : ndarray
        True growth rate per day of each day's regime: the root of the Euler-Lotka equation
        ``1 = R S/N sum_s w_s e^{-r s}`` with the SEIR's generation interval w and ``S/N`` on
        that day.
    report_shift : float
        Mean days from infection to test: a step at infection day d shows in cases by test
        date around ``d + report_shift``.
    testing_day : ndarray of int, shape (regions,)
        Test-date day of the testing-policy change (-1 where none).
    testing : AscertainmentChange
        Its size (``testing.index`` is -1: the day differs by region, see ``testing_day``).
    admissions : ndarray
        Hospital admissions by admission date (:func:`demo_seed.observation.hospital_admissions`).
    wastewater : ndarray
        Concentration divided by the faecal marker of the same sample (NaN on days without a
        sample; :func:`demo_seed.wastewater.wastewater`, one plant per region serving
        ``PLANT_SERVES`` of its people).
    admission_shift, shedding_shift : float
        Mean days from infection to admission and to shedding (a step at infection day d shows
        around ``d + shift`` in that stream).
    """

    dates: np.ndarray
    population: np.ndarray
    infections: np.ndarray
    cases: np.ndarray
    tests: np.ndarray
    positives: np.ndarray
    change_day: np.ndarray
    change_ratio: np.ndarray
    reproduction: np.ndarray
    growth: np.ndarray
    report_shift: float
    testing_day: np.ndarray
    testing: AscertainmentChange
    admissions: np.ndarray
    wastewater: np.ndarray
    admission_shift: float
    shedding_shift: float


def growth_from_reproduction(reproduction: np.ndarray, pmf: np.ndarray) -> np.ndarray:
    """Root r of ``1 = R sum_s w_s e^{-r s}`` (``pmf[0]`` = lag 1), element by element.

    Notes
    -----
    The Euler-Lotka equation of the renewal model; ``R = 1 / M(-r)`` with M the moment
    generating function of the generation interval (Wallinga & Lipsitch 2007, Proc R Soc B
    274:599, eq. 2.7).
    """
    lags = np.arange(1, pmf.shape[0] + 1)
    flat = np.asarray(reproduction, dtype=float).reshape(-1)
    out = np.empty_like(flat)
    cache: dict[float, float] = {}
    for i, big_r in enumerate(flat):
        key = round(float(big_r), 12)
        if key not in cache:
            cache[key] = float(optimize.brentq(
                lambda r, b=big_r: b * np.sum(pmf * np.exp(-r * lags)) - 1.0, -0.5, 1.0,
                xtol=1e-14))
        out[i] = cache[key]
    return out.reshape(np.shape(reproduction))


def simulate_steps(seed: int, *, regions: int = 20, days: int = 240,
                   testing_share: float = 0.5) -> StepScenario:
    """Simulate ``regions`` independent regions with known step changes.

    Parameters
    ----------
    seed : int
        Seed of every random draw.
    regions, days : int
        Size of the scenario (days at least 150).
    testing_share : float
        Expected share of regions with a testing-policy change.

    Returns
    -------
    StepScenario

    Notes
    -----
    Per region: population log-uniform in 50-250 million (so that the depletion of
    susceptibles stays below a few per cent, about 1 % typically); 1-3 steps at least 35
    days apart, from day 40 to ``days - 50`` (infection time); the first R uniform in
    ``R_RANGE``; each step multiplies R by ``e^{+-u}`` with u uniform in (log 1.1, log 1.7),
    the sign random unless incidence would then drift by more than a factor ``BAND`` from
    its start by the next step (or the end, after the last step; drift taken as ``log R / 7``
    per day): then the sign that ends nearer the start; a step leaving ``R_RANGE`` stops at
    its bound (so a few steps are smaller than 10 %). Without the steering, growing regions
    deplete their susceptibles by up to 20 % and the gradual fall of growth is itself a change
    the methods rightly see. The testing change falls at least 21 days (test-date time) from
    every step as it shows in cases. Invented values (common practice, no source).
    """
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ScenarioArgumentError("seed", seed, "must be a non-negative int")
    if days < 150:
        raise ScenarioArgumentError("days", days, "must be at least 150")
    rng = np.random.default_rng([seed, 31])
    total = days + BURN_IN
    pop = np.exp(rng.uniform(np.log(5e7), np.log(2.5e8), regions))
    reproduction = np.empty((regions, total))
    change_day = np.full((regions, 3), -1, dtype=np.int64)
    change_ratio = np.full((regions, 3), np.nan)
    for i in range(regions):
        big_r = rng.uniform(*R_RANGE)
        reproduction[i] = big_r
        k = int(rng.integers(1, 4))
        day = 40 + int(rng.integers(0, 15))
        drift = np.log(big_r) / GENERATION_MEAN * day  # rough log of incidence / incidence at 0
        for j in range(k):
            if day > days - 50:
                break
            u = rng.uniform(np.log(1.1), np.log(1.7))
            gap = 35 + int(rng.integers(0, 30))
            last = j == k - 1 or day + gap > days - 50
            span = days - day if last else gap
            first = rng.choice([-1.0, 1.0])
            options = []
            for sign in (first, -first):
                new = big_r * np.exp(sign * u)
                if not R_RANGE[0] <= new <= R_RANGE[1]:  # neither way fits: step to the bound
                    new = min(max(new, R_RANGE[0]), R_RANGE[1])
                ahead = drift + np.log(new) / GENERATION_MEAN * span
                options.append((abs(ahead) > np.log(BAND), new, ahead))
            # the random sign unless it leaves the band: then the sign ending nearer the start
            if options[0][0] or options[0][1] == big_r:
                options.sort(key=lambda o: abs(o[2]))
            _, new, ahead = options[0]
            change_day[i, j] = day
            change_ratio[i, j] = new / big_r
            reproduction[i, BURN_IN + day:] = new
            big_r = new
            drift = ahead if last else drift + np.log(new) / GENERATION_MEAN * gap
            day += gap
    w = generation_interval_pmf(LATENT_MEAN, INFECTIOUS_MEAN)
    r0 = growth_from_reproduction(reproduction[:, 0], w)
    target = np.exp(rng.uniform(np.log(300.0), np.log(1500.0), regions))
    exposed0 = np.clip(target * np.exp(-r0 * BURN_IN) * LATENT_MEAN, 20.0, pop / 100)
    seir = simulate_seir(population=pop, mixing=np.eye(regions),
                         beta=reproduction / INFECTIOUS_MEAN, latent_mean=LATENT_MEAN,
                         infectious_mean=INFECTIOUS_MEAN, initial_exposed=exposed0,
                         rng=np.random.default_rng([seed, 32]))
    infections = seir.infections[:, BURN_IN:]
    share = (seir.susceptible / pop[:, None])[:, BURN_IN:]
    growth = growth_from_reproduction(reproduction[:, BURN_IN:] * share, w)
    delay = discretised_gamma(*INFECTION_TO_TEST, max_lag=25)
    shift = mean_of_pmf(delay)
    dates = START + np.arange(days)
    testing_day = np.full(regions, -1, dtype=np.int64)
    cases = np.empty((regions, days))
    tests = np.empty((regions, days))
    positives = np.empty((regions, days))
    obs_rng = np.random.default_rng([seed, 33])
    full = np.concatenate([seir.infections[:, :BURN_IN], infections], axis=1)
    for i in range(regions):
        if rng.uniform() < testing_share:
            shown = change_day[i][change_day[i] >= 0] + shift
            options = [d for d in range(30, days - 30) if np.all(np.abs(d - shown) >= 21)]
            if options:
                testing_day[i] = int(rng.choice(options))
        change = days + BURN_IN if testing_day[i] < 0 else int(testing_day[i]) + BURN_IN
        all_dates = START - BURN_IN + np.arange(total)
        rep = case_reports(full[i : i + 1], all_dates, change, obs_rng)
        lab = lab_tests(rep.final, pop[i : i + 1], all_dates, change, obs_rng)
        cases[i] = rep.final[0, BURN_IN:]
        tests[i] = lab.tests[0, BURN_IN:]
        positives[i] = lab.positives[0, BURN_IN:]
    all_dates = START - BURN_IN + np.arange(total)
    adm = hospital_admissions(full, np.random.default_rng([seed, 34])).admissions[:, BURN_IN:]
    ww = simulate_wastewater(full, np.eye(regions), pop * PLANT_SERVES, all_dates,
                             np.random.default_rng([seed, 35]))
    normalised = (ww.concentration / ww.marker)[:, BURN_IN:]
    return StepScenario(
        dates=dates, population=pop, infections=infections, cases=cases, tests=tests,
        positives=positives, change_day=change_day, change_ratio=change_ratio,
        reproduction=reproduction[:, BURN_IN:], growth=growth, report_shift=shift,
        testing_day=testing_day, testing=testing_change_at(-1), admissions=adm,
        wastewater=normalised,
        admission_shift=mean_of_pmf(discretised_gamma(*INFECTION_TO_ADMISSION, max_lag=35)),
        shedding_shift=mean_of_pmf(discretised_gamma(*SHEDDING, max_lag=30)),
    )
