"""The invented county's influenza and RSV seasons: a small seasonal renewal model per pathogen.

All names, places and numbers are invented for the demo.

Each pathogen has its own parameters (:data:`PATHOGENS`). Daily infections of district *i* follow
a renewal equation with winter forcing and a trickle of importations,

.. math::

    \\lambda_{i,t} = R_t \\sum_k w_k I_{i,t-k} + \\iota N_i / 10^5, \\qquad
    I_{i,t} \\sim \\mathrm{Poisson}(\\lambda_{i,t}),

with :math:`\\log R_t = a_s \\cos(2\\pi (t - \\tau_s) / 365.25) - c`: reproduction above 1 from late
summer, below 1 in spring. Incidence peaks about a quarter year after :math:`\\tau_s` (the
integral of :math:`\\log R_t` peaks where :math:`R_t` falls through 1), so influenza (its
:math:`R_t` peaking in November) peaks in late January or February and RSV (peaking in
September) in December. Each season *s* (July to June) draws its own amplitude and timing, so
seasons differ in height and date; the summer trough returns to the importation floor every
year, which keeps seasons apart. GP consultations for acute respiratory illness with the pathogen
and confirmed cases are Poisson shares of the delayed infections (weekday factors of the GP and
test feeds of :mod:`demo_seed.observation`). Everything is invented: no parameter is estimated.

The simulation starts a year before the first delivered day (burn-in) so the first delivered
season is not the model's start-up.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, timedelta

import numpy as np

from demo_seed.delays import convolve_days, discretised_gamma
from demo_seed.observation import GP_WEEKDAY, TEST_WEEKDAY, weekday

__all__ = ["PATHOGENS", "PAST_SEASONS", "PathogenSeasons", "SeasonParams", "history_start",
           "simulate_seasons"]

#: Past seasons (week 40 to week 20) delivered before the demo's current one, at least.
PAST_SEASONS = 5
BURN_IN_DAYS = 365


@dataclass(frozen=True, kw_only=True)
class SeasonParams:
    """Invented parameters of one pathogen (common practice shapes, no source)."""

    generation: tuple[float, float]   # generation interval gamma mean, sd (days)
    log_r_amplitude: float            # a: mean amplitude of log R_t
    log_r_offset: float               # c: log R_t is lowered by c, so each year dies out
    amplitude_sd: float               # sd of a season's amplitude, relative
    r_peak_doy: int                   # day of year where R_t peaks (tau), on average
    peak_sd_days: float               # sd of a season's timing (days)
    imports_per_100k: float           # daily importations per 100 000
    gp_share: float                   # infections consulting a sentinel GP for ARI
    case_share: float                 # infections confirmed by a test
    to_gp: tuple[float, float]        # infection -> consultation delay, gamma mean, sd
    to_test: tuple[float, float]      # infection -> test delay, gamma mean, sd


PATHOGENS: dict[str, SeasonParams] = {
    "influenza": SeasonParams(
        generation=(3.0, 1.5), log_r_amplitude=0.13, log_r_offset=0.02, amplitude_sd=0.12,
        r_peak_doy=318, peak_sd_days=10.0, imports_per_100k=0.2, gp_share=0.030, case_share=0.06,
        to_gp=(3.0, 1.5), to_test=(3.5, 1.5),
    ),
    "rsv": SeasonParams(
        generation=(5.0, 2.0), log_r_amplitude=0.09, log_r_offset=0.015, amplitude_sd=0.10,
        r_peak_doy=262, peak_sd_days=8.0, imports_per_100k=0.2, gp_share=0.050, case_share=0.03,
        to_gp=(4.0, 2.0), to_test=(5.0, 2.0),
    ),
}


def history_start(end: date, past_seasons: int = PAST_SEASONS) -> date:
    """The first day of pathogen history: the Monday of ISO week 30 in the year in which the
    season ``past_seasons`` before the current one (the one running on ``end``) began."""
    season_year = end.year if end.isocalendar().week >= 30 else end.year - 1
    return date.fromisocalendar(season_year - past_seasons, 30, 1)


@dataclass(frozen=True)
class PathogenSeasons:
    """Daily series of one pathogen over the delivered days, shape ``(districts, days)``."""

    pathogen: str
    dates: np.ndarray
    infections: np.ndarray
    gp: np.ndarray
    cases: np.ndarray


def _season_draws(years: np.ndarray, p: SeasonParams, rng: np.random.Generator
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Amplitude and R-peak day (days since 1970) of each season year in ``years``."""
    first = int(years.min())
    n = int(years.max()) - first + 1
    amp = p.log_r_amplitude * np.exp(rng.normal(0.0, p.amplitude_sd, n))
    peak = np.array([(np.datetime64(f"{first + k}-01-01") - np.datetime64("1970-01-01"))
                     .astype(int) + p.r_peak_doy - 1 for k in range(n)], dtype=float)
    peak += rng.normal(0.0, p.peak_sd_days, n)
    return amp[years - first], peak[years - first]


def simulate_seasons(*, pathogen: str, start: date, end: date, population: np.ndarray,
                     rng: np.random.Generator) -> PathogenSeasons:
    """Simulate ``pathogen`` (a key of :data:`PATHOGENS`) for every district, ``start..end``.

    Raises
    ------
    KeyError
        If the pathogen has no parameters.
    """
    p = PATHOGENS[pathogen]
    first = start - timedelta(days=BURN_IN_DAYS)
    n = (end - first).days + 1
    dates = np.datetime64(first) + np.arange(n).astype("timedelta64[D]")
    day = dates.astype(np.int64).astype(float)
    months = dates.astype("datetime64[M]").astype(int) % 12   # 0 = January
    season_year = dates.astype("datetime64[Y]").astype(int) + 1970 - (months < 6)
    amp, peak = _season_draws(season_year, p, rng)
    r = np.exp(amp * np.cos(2 * np.pi * (day - peak) / 365.25) - p.log_r_offset)
    w = discretised_gamma(p.generation[0], p.generation[1], max_lag=20)[1:]
    w = w / w.sum()   # lag 1..20 days
    imports = p.imports_per_100k * population / 1e5
    infections = np.zeros((population.size, n))
    for t in range(n):
        k = min(t, w.size)
        force = infections[:, t - k:t][:, ::-1] @ w[:k] if k else 0.0
        infections[:, t] = rng.poisson(r[t] * force + imports)
    keep = slice(BURN_IN_DAYS, None)
    to_gp = discretised_gamma(p.to_gp[0], p.to_gp[1], max_lag=20)
    to_test = discretised_gamma(p.to_test[0], p.to_test[1], max_lag=20)
    wd = weekday(dates)
    gp_mu = GP_WEEKDAY[wd][None, :] * p.gp_share * convolve_days(infections, to_gp)
    case_mu = TEST_WEEKDAY[wd][None, :] * p.case_share * convolve_days(infections, to_test)
    return PathogenSeasons(
        pathogen=pathogen, dates=dates[keep], infections=infections[:, keep],
        gp=rng.poisson(gp_mu[:, keep]).astype(float),
        cases=rng.poisson(case_mu[:, keep]).astype(float),
    )
