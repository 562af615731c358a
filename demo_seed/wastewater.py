"""Wastewater observation model: concentration, flow and faecal marker per treatment plant.

All names, places and numbers are invented for the demo.

The RNA signal follows infections through a shedding profile that peaks a few days after
infection, so it leads confirmed cases (which add incubation, the wait for a test and the
reporting delay).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from demo_seed.delays import convolve_days, discretised_gamma
from demo_seed.observation import weekday

__all__ = ["Wastewater", "wastewater"]

SHEDDING = (3.0, 2.5)                   # gamma mean, sd of shedding by days since infection
SHED_PER_INFECTION = 2.0e10             # gene copies over the whole episode
MARKER_PER_PERSON_DAY = 2.0e10          # faecal marker copies
SEWAGE_LITRES_PER_PERSON = 220.0
RAIN_PROBABILITY = 0.25
DETECTION_LIMIT = 400.0                 # gene copies per litre
CONCENTRATION_SD, MARKER_SD, HANDLING_SD = 0.40, 0.30, 0.20   # log-scale noise
SAMPLE_WEEKDAYS = ((0, 2, 4), (1, 3), (0, 3), (1, 4), (0, 2, 4))
MISSED_SAMPLE = 0.05


@dataclass(frozen=True)
class Wastewater:
    """Per plant and day, shape ``(plants, days)``; NaN on days without a sample.

    ``concentration`` gene copies per litre, ``flow`` m3 per day (24-hour composite),
    ``marker`` faecal-marker copies per litre, ``sampled`` boolean mask, ``load`` the true
    shed gene copies per day (no noise, every day).
    """

    concentration: np.ndarray
    flow: np.ndarray
    marker: np.ndarray
    sampled: np.ndarray
    load: np.ndarray


def _flow(served: np.ndarray, days: int, rng: np.random.Generator) -> np.ndarray:
    """Daily inflow in m3: dry-weather flow times rain events that decay over two days."""
    rain = rng.binomial(1, RAIN_PROBABILITY, size=(served.shape[0], days)) * rng.gamma(
        2.0, 0.3, size=(served.shape[0], days))
    wet = rain.copy()
    wet[:, 1:] += 0.5 * rain[:, :-1]
    wet[:, 2:] += 0.2 * rain[:, :-2]
    dry = served[:, None] * SEWAGE_LITRES_PER_PERSON / 1000.0
    return dry * (1.0 + wet) * rng.lognormal(0.0, 0.05, size=wet.shape)


def wastewater(infections: np.ndarray, catchment: np.ndarray, served: np.ndarray,
               dates: np.ndarray, rng: np.random.Generator) -> Wastewater:
    """Simulate sampled wastewater concentrations for each plant.

    Parameters
    ----------
    infections : numpy.ndarray
        True infections, shape ``(districts, days)``.
    catchment : numpy.ndarray
        Served population shares, shape ``(plants, districts)``.
    served : numpy.ndarray
        Served population per plant, shape ``(plants,)``.
    dates : numpy.ndarray
        ``datetime64[D]`` dates, shape ``(days,)``.
    rng : numpy.random.Generator

    Notes
    -----
    Load :math:`L_{p,t} = G \\sum_i s_{p,i} \\sum_k h_k I_{i,t-k}` with shedding profile *h*
    (gamma, mean 3 d: stool RNA is highest in the first week of illness, Wölfel et al.
    2020 [1]_) and *G* copies shed per infection. Concentration
    :math:`C = L / (1000 Q) \\cdot e^{\\epsilon + \\eta}` with flow *Q* (m3/day, rain
    dilution), measurement noise :math:`\\epsilon \\sim N(0, 0.4^2)` and a sample-handling
    factor :math:`\\eta \\sim N(0, 0.2^2)` shared with the faecal marker
    :math:`M = m P_p / (1000 Q) \\cdot e^{\\delta + \\eta}`, so normalising by the marker
    removes dilution and handling. Values below the detection limit are reported as half of
    it (a common substitution, no source). Plants sample on fixed weekdays (2 or 3 a week,
    as asked by Commission Recommendation (EU) 2021/472 [2]_), with occasional misses.

    References
    ----------
    .. [1] Wölfel, R. et al. (2020). Virological assessment of hospitalized patients with
       COVID-2019. Nature 581, 465-469.
    .. [2] Commission Recommendation (EU) 2021/472 of 17 March 2021 on a common approach to
       establish a systematic surveillance of SARS-CoV-2 and its variants in wastewaters.
    """
    n_plants, days = catchment.shape[0], dates.shape[0]
    profile = discretised_gamma(*SHEDDING, max_lag=30)
    shedding = catchment @ convolve_days(infections, profile)
    load = SHED_PER_INFECTION * shedding
    flow = _flow(served, days, rng)
    litres = flow * 1000.0
    handling = rng.normal(0.0, HANDLING_SD, size=(n_plants, days))
    conc = load / litres * np.exp(rng.normal(0.0, CONCENTRATION_SD, size=(n_plants, days))
                                  + handling)
    conc = np.where(conc < DETECTION_LIMIT, DETECTION_LIMIT / 2.0, conc)
    marker = MARKER_PER_PERSON_DAY * served[:, None] / litres * np.exp(
        rng.normal(0.0, MARKER_SD, size=(n_plants, days)) + handling)
    wd = weekday(dates)
    scheduled = np.array([np.isin(wd, SAMPLE_WEEKDAYS[p % len(SAMPLE_WEEKDAYS)])
                          for p in range(n_plants)])
    sampled = scheduled & (rng.random((n_plants, days)) >= MISSED_SAMPLE)
    nan = np.full((n_plants, days), np.nan)
    return Wastewater(concentration=np.where(sampled, conc, nan),
                      flow=np.where(sampled, flow, nan),
                      marker=np.where(sampled, marker, nan), sampled=sampled, load=load)
