"""Observation models: what the feeds of the invented county would report.

All names, places and numbers are invented for the demo.

Every function takes true daily infections shaped ``(districts, days)`` (or counts derived
from them) and a seeded :class:`numpy.random.Generator`, and returns a frozen dataclass of
arrays. Reporting (which value is known on which day) is handled in :mod:`demo_seed.vintages`.
Weekday arrays are indexed Monday = 0 .. Sunday = 6.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from demo_seed.delays import convolve_days, discretised_gamma, discretised_lognormal

__all__ = [
    "CaseReports",
    "GpConsultations",
    "HospitalAdmissions",
    "IcuCensus",
    "WardCensus",
    "LabTests",
    "AscertainmentChange",
    "case_reports",
    "gp_consultations",
    "hospital_admissions",
    "icu_census",
    "ward_census",
    "lab_tests",
    "testing_change",
    "weekday",
]

INFECTION_TO_TEST = (8.5, 3.5)          # gamma mean, sd (days): incubation + time to test
ASCERTAINMENT = (0.28, 0.45)            # before, after the testing-policy change
TEST_WEEKDAY = np.array([1.15, 1.10, 1.05, 1.05, 1.00, 0.75, 0.55])
REPORT_DELAY = np.array([0.22, 0.38, 0.18, 0.09, 0.05, 0.03, 0.02, 0.012, 0.008, 0.005, 0.005])
REPORT_WEEKDAY = np.array([1.40, 1.00, 1.00, 1.00, 1.00, 0.50, 0.30])
NEGATIVE_TESTS_PER_100K = (150.0, 420.0)
HOSPITALISED_SHARE = 0.03
INFECTION_TO_ADMISSION = (10.0, 4.0)
ICU_SHARE = 0.18
ICU_LOS_MEDIAN, ICU_LOS_SIGMA = 8.0, 0.71
#: General (ward) beds: stays log-normal, median 6 days, quartiles about 4 and 9 (invented);
#: staffed general beds per ICU bed of the region (invented).
WARD_LOS_MEDIAN, WARD_LOS_SIGMA = 6.0, 0.6
WARD_BEDS_PER_ICU_BED = 6.0
GP_WEEKDAY = np.array([1.35, 1.10, 1.00, 1.00, 0.95, 0.15, 0.05])
GP_BASELINE_PER_100K = 25.0
GP_SHARE_OF_INFECTIONS = 0.10


@dataclass(frozen=True)
class AscertainmentChange:
    """The true testing-policy change: from ``index`` (a test-date day) ascertainment steps
    from ``ascertainment[0]`` to ``ascertainment[1]`` and negative tests per 100 000 a day
    (before weekday and winter factors) from ``negatives_per_100k[0]`` to ``[1]``."""

    index: int
    ascertainment: tuple[float, float]
    negatives_per_100k: tuple[float, float]

    @property
    def case_ratio(self) -> float:
        """Factor on expected cases: ascertainment after / before."""
        return self.ascertainment[1] / self.ascertainment[0]


def testing_change(change_index: int) -> AscertainmentChange:
    """The testing change the observation models apply at ``change_index``."""
    return AscertainmentChange(change_index, ASCERTAINMENT, NEGATIVE_TESTS_PER_100K)


def weekday(dates: np.ndarray) -> np.ndarray:
    """Weekday of ``datetime64[D]`` dates, Monday = 0 (1970-01-01 was a Thursday)."""
    return (dates.astype("datetime64[D]").astype(np.int64) + 3) % 7


def _seasonal(dates: np.ndarray, amplitude: float, peak_doy: int) -> np.ndarray:
    doy = (dates - dates.astype("datetime64[Y]")).astype(int) + 1
    return 1.0 + amplitude * np.cos(2.0 * np.pi * (doy - peak_doy) / 365.25)


@dataclass(frozen=True)
class CaseReports:
    """Cases by reference (test) date, split by reporting delay.

    ``by_delay[i, t, d]`` cases with test date *t* first reported on day *t + d*;
    ``final`` = ``by_delay.sum(axis=2)``; ``ascertainment`` shaped ``(days,)``.
    """

    by_delay: np.ndarray
    final: np.ndarray
    ascertainment: np.ndarray


def case_reports(infections: np.ndarray, dates: np.ndarray, change_index: int,
                 rng: np.random.Generator) -> CaseReports:
    """Simulate confirmed cases by test date and their reporting delays.

    Notes
    -----
    Expected cases by test date
    :math:`\\mu_{i,t} = a_t \\, w^{test}_{t} \\sum_k g_k I_{i,t-k}` with the infection-to-test
    delay *g* (gamma, mean 8.5 d: the 5.1-day median incubation of Lauer et al. (2020) [1]_
    plus about three days to a test), ascertainment :math:`a_t` stepping up at the
    testing-policy change and a weekday factor. Cases are Poisson. The reporting delay of a
    case tested on day *t* is *d* with probability :math:`\\propto q_d \\, u_{t+d}`: a base
    pmf *q* (most within 3 days) times a weight of the reporting weekday *u* (few reports at
    weekends, catch-up on Mondays); counts are split by a multinomial draw.

    References
    ----------
    .. [1] Lauer, S. A. et al. (2020). The incubation period of coronavirus disease 2019.
       Annals of Internal Medicine 172(9), 577-582.
    """
    days = dates.shape[0]
    delay = discretised_gamma(*INFECTION_TO_TEST, max_lag=25)
    asc = np.where(np.arange(days) < change_index, ASCERTAINMENT[0], ASCERTAINMENT[1])
    wd = weekday(dates)
    mu = convolve_days(infections, delay) * (asc * TEST_WEEKDAY[wd])[None, :]
    final = rng.poisson(mu)
    lags = np.arange(REPORT_DELAY.shape[0])
    report_wd = (wd[:, None] + lags[None, :]) % 7
    pvals = REPORT_DELAY[None, :] * REPORT_WEEKDAY[report_wd]
    pvals /= pvals.sum(axis=1, keepdims=True)
    by_delay = rng.multinomial(final, pvals)
    return CaseReports(by_delay=by_delay.astype(float), final=final.astype(float),
                       ascertainment=asc)


@dataclass(frozen=True)
class LabTests:
    """Tests and positives by test date, shape ``(districts, days)``; positives <= tests."""

    tests: np.ndarray
    positives: np.ndarray


def lab_tests(final_cases: np.ndarray, population: np.ndarray, dates: np.ndarray,
                change_index: int, rng: np.random.Generator) -> LabTests:
    """Tests = positives (the final cases) + negative tests.

    Notes
    -----
    Negatives are Poisson with mean :math:`N_i \\, r_t \\, w^{test}_t \\, s_t / 10^5`, the rate
    :math:`r_t` per 100 000 jumping at the testing-policy change (wider testing: tests jump
    up, positivity drops), a weekday factor and a mild winter factor :math:`s_t`.
    Invented rates (common practice, no source).
    """
    days = dates.shape[0]
    rate = np.where(np.arange(days) < change_index, *NEGATIVE_TESTS_PER_100K)
    season = _seasonal(dates, 0.25, 20)
    mu = population[:, None] / 1e5 * (rate * TEST_WEEKDAY[weekday(dates)] * season)[None, :]
    negatives = rng.poisson(mu).astype(float)
    return LabTests(tests=final_cases + negatives, positives=final_cases.copy())


@dataclass(frozen=True)
class HospitalAdmissions:
    """Hospital admissions by admission date, shape ``(districts, days)``."""

    admissions: np.ndarray


def hospital_admissions(infections: np.ndarray,
                        rng: np.random.Generator) -> HospitalAdmissions:
    """Poisson admissions: a share of infections after a gamma infection-to-admission delay.

    Notes
    -----
    :math:`\\mu_{i,t} = h \\sum_k g_k I_{i,t-k}`, :math:`h` = ``HOSPITALISED_SHARE`` (age-free,
    invented), *g* gamma with mean 10 and sd 4 days (invented, common practice, no source).
    """
    delay = discretised_gamma(*INFECTION_TO_ADMISSION, max_lag=35)
    mu = HOSPITALISED_SHARE * convolve_days(infections, delay)
    return HospitalAdmissions(admissions=rng.poisson(mu).astype(float))


@dataclass(frozen=True)
class IcuCensus:
    """ICU census per region, shape ``(regions, days)``.

    ``occupied`` patients in ICU at the daily census, ``staffed`` staffed beds, ``arrivals``
    patients needing ICU, ``transferred`` those sent outside the county for want of a bed.
    """

    occupied: np.ndarray
    staffed: np.ndarray
    arrivals: np.ndarray
    transferred: np.ndarray


def _staffing_noise(beds: np.ndarray, days: int, rng: np.random.Generator) -> np.ndarray:
    """Base staffed beds with a few small step changes (staff rota, maintenance)."""
    steps = np.zeros((beds.shape[0], days))
    for _ in range(4):
        when = rng.integers(0, days, size=beds.shape[0])
        size = rng.choice(np.array([-2.0, -1.0, 1.0, 2.0]), size=beds.shape[0])
        steps += size[:, None] * (np.arange(days)[None, :] >= when[:, None])
    return np.maximum(beds[:, None] + np.clip(steps, -3, 3), 1.0)


def icu_census(admissions: np.ndarray, region_index: np.ndarray, beds: np.ndarray,
               rng: np.random.Generator) -> IcuCensus:
    """ICU occupancy with length of stay, staffed capacity, surge and overflow.

    Notes
    -----
    A share ``ICU_SHARE`` of each region's hospital admissions needs intensive care 0-3 days
    after admission. Stays are log-normal with median 8 days and quartiles about 5 and 13,
    as pooled by Rees et al. (2020) [1]_. Each day, in order: discharges leave, staffed beds
    are set, arrivals take free beds and the rest are transferred out of the county (so
    occupancy never exceeds staffed beds), then the census is taken. Surge: once occupancy
    reaches 80 % of staffed beds on 3 days in a row, 25 % more beds are staffed 4 days later,
    until occupancy stays below 45 % of base beds for 10 days.

    References
    ----------
    .. [1] Rees, E. M. et al. (2020). COVID-19 length of hospital stay: a systematic review
       and data synthesis. BMC Medicine 18, 270.
    """
    n_regions = beds.shape[0]
    days = admissions.shape[1]
    onehot = (region_index[None, :] == np.arange(n_regions)[:, None]).astype(float)
    needing = rng.binomial((onehot @ admissions).astype(np.int64), ICU_SHARE)
    shift = rng.multinomial(needing, np.array([0.3, 0.4, 0.2, 0.1]))
    arrivals = np.zeros((n_regions, days))
    for k in range(shift.shape[2]):
        arrivals[:, k:] += shift[:, : days - k, k]
    los = discretised_lognormal(ICU_LOS_MEDIAN, ICU_LOS_SIGMA, max_lag=60)
    base = _staffing_noise(beds.astype(float), days, rng)
    schedule = np.zeros((n_regions, days + los.shape[0] + 1))
    occupied = np.zeros((n_regions, days))
    staffed = np.zeros((n_regions, days))
    transferred = np.zeros((n_regions, days))
    occ = np.zeros(n_regions)
    high = np.zeros(n_regions, dtype=int)
    low = np.zeros(n_regions, dtype=int)
    surge_from = np.full(n_regions, -1)
    for t in range(days):
        occ = occ - schedule[:, t]
        active = (surge_from >= 0) & (surge_from <= t)
        staffed[:, t] = np.round(base[:, t] * np.where(active, 1.25, 1.0))
        admit = np.minimum(arrivals[:, t], np.maximum(staffed[:, t] - occ, 0.0))
        transferred[:, t] = arrivals[:, t] - admit
        stays = rng.multinomial(admit.astype(np.int64), los)
        stays[:, 1] += stays[:, 0]          # a stay of under half a day still uses the bed
        stays[:, 0] = 0
        schedule[:, t : t + los.shape[0]] += stays
        occ = occ + admit
        occupied[:, t] = occ
        high = np.where(occ >= 0.8 * staffed[:, t], high + 1, 0)
        low = np.where(occ < 0.45 * base[:, t], low + 1, 0)
        surge_from = np.where((surge_from < 0) & (high >= 3), t + 4, surge_from)
        surge_from = np.where((surge_from >= 0) & (surge_from < t) & (low >= 10), -1,
                              surge_from)
    return IcuCensus(occupied=occupied, staffed=staffed, arrivals=arrivals,
                     transferred=transferred)


@dataclass(frozen=True)
class WardCensus:
    """General-bed census per region, shape ``(regions, days)``: ``occupied`` patients with the
    infection in a general (non-intensive-care) bed at the daily census, ``staffed`` staffed
    general beds (for all patients, not only these)."""

    occupied: np.ndarray
    staffed: np.ndarray


def ward_census(admissions: np.ndarray, region_index: np.ndarray, icu_beds: np.ndarray,
                rng: np.random.Generator) -> WardCensus:
    """General-bed occupancy of the infection's patients and staffed general beds.

    Notes
    -----
    Every hospital admission takes a general bed on its admission day for a log-normal stay
    (median ``WARD_LOS_MEDIAN`` days; those later moved to intensive care included: the demo
    keeps it simple). Staffed general beds are ``WARD_BEDS_PER_ICU_BED`` times the region's
    base ICU beds with small step changes; all numbers invented. The infection's patients
    share them with everyone else, so their census is far below the staffed beds; no overflow.
    """
    n_regions = icu_beds.shape[0]
    days = admissions.shape[1]
    onehot = (region_index[None, :] == np.arange(n_regions)[:, None]).astype(float)
    arrivals = (onehot @ admissions).astype(np.int64)
    los = discretised_lognormal(WARD_LOS_MEDIAN, WARD_LOS_SIGMA, max_lag=45)
    los[1] += los[0]  # a stay of under half a day still uses the bed
    los[0] = 0.0
    schedule = np.zeros((n_regions, days + los.shape[0]))
    for t in range(days):
        schedule[:, t: t + los.shape[0]] += rng.multinomial(arrivals[:, t], los)
    occupied = np.cumsum(arrivals, axis=1) - np.cumsum(schedule[:, :days], axis=1)
    staffed = np.round(_staffing_noise(WARD_BEDS_PER_ICU_BED * icu_beds.astype(float), days, rng))
    return WardCensus(occupied=occupied.astype(float), staffed=staffed)


@dataclass(frozen=True)
class GpConsultations:
    """GP consultations for acute respiratory illness, shape ``(districts, days)``."""

    consultations: np.ndarray
    baseline: np.ndarray


def gp_consultations(infections: np.ndarray, population: np.ndarray, dates: np.ndarray,
                     rng: np.random.Generator) -> GpConsultations:
    """Daily GP consultations for acute respiratory illness (ARI).

    Notes
    -----
    :math:`\\mu_{i,t} = w^{GP}_t \\big(b N_i s_t / 10^5 + c \\sum_k g_k I_{i,t-k}\\big)`: a
    baseline of ``GP_BASELINE_PER_100K`` consultations per 100 000 a day for other viruses
    with a winter peak :math:`s_t = 1 + 0.6 \\cos(2\\pi (d - 20)/365.25)`, plus a share *c* of
    infections consulting about 6 days after infection (gamma delay *g*), times a weekday
    factor (surgeries mostly closed at weekends). Poisson counts. Invented rates
    (common practice, no source).
    """
    delay = discretised_gamma(6.0, 2.5, max_lag=20)
    wd = GP_WEEKDAY[weekday(dates)]
    base = GP_BASELINE_PER_100K * population[:, None] / 1e5 * _seasonal(dates, 0.6, 20)[None, :]
    mu = wd[None, :] * (base + GP_SHARE_OF_INFECTIONS * convolve_days(infections, delay))
    return GpConsultations(consultations=rng.poisson(mu).astype(float),
                           baseline=base * wd[None, :])
