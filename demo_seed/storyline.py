"""The invented storyline of the demo: seasons, reactive policies, a variant, the true epidemic.

All names, places and numbers are invented for the demo.

Transmission is the product of a seasonal cosine (peak in mid-January), a more transmissible
variant that takes over around 44 % of the scenario, and policy levels. Policies react to the
epidemic like an office would: contact limits come when the county's weekly incidence (as
seen five days late) passes a threshold and are eased when it falls back, and people cut
contacts as local incidence rises (awareness-driven behaviour). Reacting keeps the shape of
the scenario -- a first wave stopped by limits, a quiet spell, a larger second wave (the one
that fills the ICUs), and a third wave after easing -- much the same for any end date and
seed. A policy not triggered by its latest day is placed at that day.

The last :data:`EPILOGUE_DAYS` days follow a script anchored to the end date, so that the
newest morning tells the same story for any seed, length and end date: the west (Upper
Corven) is past its wave, two of its districts only lately; the centre (Astrel Downs) sits on
a plateau; in the east (Grennwater) a village has a local outbreak and the largest district
has begun to rise, its neighbours more slowly (:data:`SCRIPT`). The policies' windows are
fractions of the days before the epilogue, so the three waves play out before it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import date, timedelta

import numpy as np

from demo_seed.epidemic import (
    SeirResult,
    generation_interval_pmf,
    mixing_matrix,
    simulate_seir,
)
from demo_seed.geography import Geography

__all__ = ["Calendar", "TransmissionChange", "Truth", "build_calendar", "simulate_truth"]

LATENT_MEAN = 3.0            # days in E (geometric)
INFECTIOUS_MEAN = 4.0        # days in I (geometric)
R_BASE = 1.55                # reproduction number: no immunity, no policy, mean season
SEASONAL_AMPLITUDE = 0.12
SEASONAL_PEAK_DOY = 15       # mid-January
WANING_DAYS = 365.0
VARIANT_CENTRE, VARIANT_WIDTH, VARIANT_FACTOR = 0.44, 0.025, 1.55
TESTING_CHANGE = 0.50
POLICY_RAMP_DAYS = 5
SIGNAL_LAG_DAYS = 5
SEED_EXPOSED = {"D01": 40.0, "D08": 12.0, "D12": 6.0}
IMPORTATION_PER_PERSON = 1.5e-6
AWARENESS_SCALE = 1500.0     # weekly infections per 100 000 that halve contacts
EPILOGUE_DAYS = 105          # the last 15 weeks follow SCRIPT
SCRIPT_GAIN = 1.0            # share of the gap to the script closed per generation
SCRIPT_RT = (0.4, 3.0)       # reproduction numbers the script may ask for

# District -> the course of its true infections per 100 000 per 7 days over the epilogue, as
# anchors (days before the end date, level); it starts from where the district stands
# EPILOGUE_DAYS before the end and is log-linear between anchors. Cases follow infections by
# about 8 days and are about 45 % of them, so, with the demo policy's thresholds and timing
# (enter on the lower bound, 28 days lower before a step down, 5 days higher before a step
# up), the anchors below bring: the west down to Heightened a month before the end except
# Kessanthal and Wendmarsh, whose steps down are recommended in the last week; the centre on
# High; Haldenmoor (a village, too small to fill the region's ICU) on Severe; Grennick up to
# High in the last days, and rising infections in its neighbours. Invented for the demo.
_LOW = ((84, 45.0), (0, 40.0))
_PLATEAU = ((84, 250.0), (0, 250.0))
SCRIPT: dict[str, tuple[tuple[int, float], ...]] = {
    "D01": ((84, 110.0), (0, 110.0)),
    "D02": _LOW,
    "D03": ((84, 110.0), (0, 110.0)),
    "D04": ((84, 900.0), (0, 900.0)),
    "D05": ((84, 900.0), (63, 900.0), (45, 80.0), (0, 75.0)),
    "D06": _PLATEAU, "D07": _PLATEAU, "D08": _PLATEAU, "D09": _PLATEAU, "D10": _PLATEAU,
    "D11": _LOW,
    "D12": ((84, 150.0), (35, 150.0), (0, 450.0)),
    "D13": ((84, 45.0), (30, 40.0), (5, 1500.0), (0, 1800.0)),
    "D14": ((84, 45.0), (25, 40.0), (0, 1200.0)),
}


@dataclass(frozen=True)
class PolicyRule:
    """An invented policy: new level, trigger and the window in which it may fire."""

    label: str
    level: float
    rising: bool            # fires when incidence rises above (True) or falls below (False)
    threshold: float        # true infections per 100 000 per 7 days, seen with a lag
    earliest: float         # fraction of the scenario
    latest: float
    min_gap_days: int


POLICIES: tuple[PolicyRule, ...] = (
    PolicyRule("Contact limits for indoor gatherings", 0.55, True, 250.0, 0.04, 0.20, 0),
    PolicyRule("Indoor gathering limits eased", 0.85, False, 60.0, 0.15, 0.40, 42),
    PolicyRule("Renewed contact limits and home-working advice", 0.40, True, 800.0, 0.25,
               0.70, 42),
    PolicyRule("Limits eased, masks advised in clinics", 0.55, False, 200.0, 0.62, 0.90, 42),
)


@dataclass(frozen=True)
class Calendar:
    """Dates and the non-reactive multipliers of the scenario; arrays shaped ``(days,)``."""

    dates: np.ndarray
    seasonal: np.ndarray
    variant: np.ndarray
    testing_change: date


@dataclass(frozen=True)
class TransmissionChange:
    """A true change of the policy multiplier of transmission.

    ``date`` is the first day of the change (in infection time), which is complete after
    ``ramp_days`` days; ``ratio`` = new multiplier / old one (0.55 means transmission falls by
    45 %). Reported counts show it after the delay from infection to test.
    """

    date: date
    ramp_days: int
    ratio: float
    label: str


@dataclass(frozen=True)
class Truth:
    """Ground truth of the scenario; arrays shaped ``(districts, days)`` unless noted.

    ``rt`` is the instantaneous reproduction number :math:`\\beta_{i,t} S_{i,t}/N_i \\cdot D`
    (transmission rate with the behavioural response, times susceptible share at the start of
    the day, times mean infectious days :math:`D`, local mixing) -- not a renewal-equation
    estimate. ``generation_interval`` is the pmf implied by the SEIR step order (index 0 =
    lag 1 day), so incidence follows :math:`I_t \\approx R_t \\sum_s w_s I_{t-s}`.
    ``transmission`` (seasonal x variant x policy, without the behavioural response) and
    ``policy`` are ``(days,)`` multipliers; ``population`` is ``(districts,)``.
    ``transmission_changes`` records each policy step's date and size.
    """

    dates: np.ndarray
    districts: tuple[str, ...]
    infections: np.ndarray
    rt: np.ndarray
    generation_interval: np.ndarray
    importations: np.ndarray
    susceptible: np.ndarray
    exposed: np.ndarray
    infectious: np.ndarray
    recovered: np.ndarray
    transmission: np.ndarray
    policy: np.ndarray
    population: np.ndarray
    policy_dates: tuple[tuple[date, str], ...]
    transmission_changes: tuple[TransmissionChange, ...] = ()


def _ramp(days: int, start: int, width: int) -> np.ndarray:
    """0 before ``start``, 1 from ``start + width - 1``, linear in between."""
    t = np.arange(days)
    return np.clip((t - start + 1) / width, 0.0, 1.0)


def build_calendar(start: date, days: int) -> Calendar:
    """Dates, seasonal and variant multipliers from ``start`` for ``days`` days.

    Notes
    -----
    Seasonal multiplier :math:`1 + a \\cos(2\\pi (d - d_0)/365.25)` with day of year *d*,
    :math:`a` = ``SEASONAL_AMPLITUDE``, :math:`d_0` = ``SEASONAL_PEAK_DOY`` [1]_; variant
    multiplier logistic, :math:`1 + (f - 1)/(1 + e^{-(t - t_v)/w})`.

    References
    ----------
    .. [1] Dushoff, J., Plotkin, J. B., Levin, S. A. and Earn, D. J. D. (2004). Dynamical
       resonance can account for seasonality of influenza epidemics. PNAS 101(48),
       16915-16916.
    """
    dates = np.datetime64(start, "D") + np.arange(days)
    doy = (dates - dates.astype("datetime64[Y]")).astype(int) + 1
    seasonal = 1.0 + SEASONAL_AMPLITUDE * np.cos(2.0 * np.pi * (doy - SEASONAL_PEAK_DOY) / 365.25)
    t = np.arange(days)
    variant = 1.0 + (VARIANT_FACTOR - 1.0) / (
        1.0 + np.exp(-(t - VARIANT_CENTRE * days) / (VARIANT_WIDTH * days)))
    change = start + timedelta(days=int(round(TESTING_CHANGE * days)))
    return Calendar(dates=dates, seasonal=seasonal, variant=variant, testing_change=change)


def _policy_curve(days: int, fired: list[int]) -> np.ndarray:
    curve = np.ones(days)
    level = 1.0
    for rule, day in zip(POLICIES, fired, strict=False):
        curve += (rule.level - level) * _ramp(days, day, POLICY_RAMP_DAYS)
        level = rule.level
    return curve


def _trigger_day(signal: np.ndarray, rule: PolicyRule, previous: int, span: int) -> int:
    """First day the rule fires in its window; its latest day if it never does."""
    days = span
    first = max(int(rule.earliest * days), previous + rule.min_gap_days)
    last = max(int(rule.latest * days), first)
    window = signal[first : last + 1]
    hit = window >= rule.threshold if rule.rising else window <= rule.threshold
    return first + int(np.argmax(hit)) if np.any(hit) else last


def _script_levels(codes: tuple[str, ...], start: np.ndarray) -> np.ndarray:
    """Scripted weekly infections per 100 000, shape ``(districts, EPILOGUE_DAYS + 1)``, column
    *k* for *k* days before the end; column ``EPILOGUE_DAYS`` is ``start``."""
    k = np.arange(EPILOGUE_DAYS + 1)
    out = np.empty((len(codes), k.size))
    for i, code in enumerate(codes):
        anchors = ((EPILOGUE_DAYS, max(float(start[i]), 1.0)), *SCRIPT[code])
        ks = np.array([a for a, _ in anchors][::-1], dtype=float)
        logs = np.log([v for _, v in anchors][::-1])
        out[i] = np.exp(np.interp(k, ks, logs))
    return out


def script_control(codes: tuple[str, ...], population: np.ndarray, days: int,
                   generation_interval: np.ndarray) -> Callable[[int, np.ndarray], np.ndarray]:
    """The ``target_rt`` of :func:`~demo_seed.epidemic.simulate_seir` that follows :data:`SCRIPT`.

    Notes
    -----
    On day *t* of the epilogue, with *x* the district's infections per 100 000 over the last
    7 days and :math:`T(k)` the script *k* days before the end, the growth rate asked for is
    the script's own, :math:`r = \\ln(T(k-1)/T(k))`, plus a share ``SCRIPT_GAIN`` of the gap
    :math:`\\ln(T(k+4)/x)` per mean generation time :math:`\\bar g` (the trailing week is
    centred 4 days back). It becomes a reproduction number through the Euler-Lotka equation
    of the model's generation interval, :math:`R = 1 / \\sum_s w_s e^{-r s}` [1]_, bounded by
    ``SCRIPT_RT``.

    References
    ----------
    .. [1] Wallinga, J. and Lipsitch, M. (2007). How generation intervals shape the
       relationship between growth rates and reproductive numbers. Proc. R. Soc. B 274,
       599-604.
    """
    first = days - 1 - EPILOGUE_DAYS
    lags = np.arange(1, generation_interval.size + 1)
    mean_gen = float(np.sum(lags * generation_interval))
    levels: list[np.ndarray] = []
    nan = np.full(len(codes), np.nan)

    def target(t: int, infections: np.ndarray) -> np.ndarray:
        if t < max(first, 7):
            return nan
        week = infections[:, t - 7 : t].sum(axis=1) / population * 1e5
        if not levels:
            levels.append(_script_levels(codes, week))
        path = levels[0]
        k = days - 1 - t
        ahead = path[:, max(k - 1, 0)]
        behind = path[:, min(k + 4, EPILOGUE_DAYS)]
        gap = np.log(behind / np.maximum(week, 0.5))
        r = np.log(ahead / path[:, k]) + SCRIPT_GAIN * gap / mean_gen
        rt = 1.0 / np.sum(generation_interval[None, :] * np.exp(-r[:, None] * lags[None, :]),
                          axis=1)
        return np.clip(rt, *SCRIPT_RT)

    return target


def simulate_truth(geography: Geography, calendar: Calendar, seed: int | None) -> Truth:
    """Run the SEIR model for the county with reactive policies.

    Parameters
    ----------
    geography : Geography
    calendar : Calendar
    seed : int or None
        Seed of the epidemic's random stream; ``None`` runs the deterministic mean.

    Notes
    -----
    :math:`\\beta_{i,t} = R_{base} f_i s_t v_t p_t / D` with seasonal, variant and policy
    multipliers, district factor :math:`f_i = 1 + 0.06 \\log_{10}(N_i / 10^5)` (larger places
    mix more) and mean infectious days :math:`D`. Neighbour coupling
    :math:`c_i = 0.25 - 0.03 \\ln(N_i / 8000)` (small districts commute more). Importations
    are Poisson with mean ``IMPORTATION_PER_PERSON`` :math:`N_i` per day, doubled in July and
    August. Policy *k* fires on the first day its 7-day county incidence, lagged by
    ``SIGNAL_LAG_DAYS``, crosses its threshold. The run is repeated once per policy with the
    same seed: the path before the new policy day is unchanged, so each trigger is exact.
    All rates are invented for the demo (common practice, no source).
    """
    pop = geography.district_populations()
    codes = geography.district_codes
    days = calendar.dates.shape[0]
    factor = 1.0 + 0.06 * np.log10(pop / 1e5)
    coupling = np.clip(0.25 - 0.03 * np.log(pop / 8000.0), 0.05, 0.3)
    mix = mixing_matrix(geography.adjacency(), pop, coupling)
    months = calendar.dates.astype("datetime64[M]").astype(int) % 12 + 1
    travel = np.where((months == 7) | (months == 8), 2.0, 1.0)
    imports = IMPORTATION_PER_PERSON * pop[:, None] * travel[None, :]
    e0 = np.array([SEED_EXPOSED.get(c, 0.0) for c in codes])
    base = (R_BASE / INFECTIOUS_MEAN) * factor[:, None] * (calendar.seasonal
                                                           * calendar.variant)[None, :]

    gi = generation_interval_pmf(LATENT_MEAN, INFECTIOUS_MEAN)
    story_days = max(days - EPILOGUE_DAYS, 1)  # the policies play out before the epilogue

    def run(fired: list[int]) -> SeirResult:
        rng = None if seed is None else np.random.default_rng([seed, 11])
        control = script_control(codes, pop, days, gi)
        beta = base * _policy_curve(days, fired)[None, :]
        return simulate_seir(population=pop, mixing=mix, beta=beta, latent_mean=LATENT_MEAN,
                             infectious_mean=INFECTIOUS_MEAN, initial_exposed=e0,
                             importation_rate=imports, waning_days=WANING_DAYS,
                             awareness_scale=AWARENESS_SCALE, awareness_lag=SIGNAL_LAG_DAYS,
                             rng=rng, target_rt=control)

    fired: list[int] = []
    res = run(fired)
    for rule in POLICIES:
        weekly = np.convolve(res.infections.sum(axis=0), np.ones(7))[:days] / pop.sum() * 1e5
        seen = np.concatenate([np.zeros(SIGNAL_LAG_DAYS), weekly[: days - SIGNAL_LAG_DAYS]])
        fired.append(_trigger_day(seen, rule, fired[-1] if fired else 0, story_days))
        res = run(fired)
    start = calendar.dates[0].astype(object)
    policy_dates = tuple((start + timedelta(days=d), rule.label)
                         for rule, d in zip(POLICIES, fired, strict=True))
    levels = [1.0, *(rule.level for rule in POLICIES)]
    changes = tuple(
        TransmissionChange(date=start + timedelta(days=d), ramp_days=POLICY_RAMP_DAYS,
                           ratio=levels[k + 1] / levels[k], label=rule.label)
        for k, (rule, d) in enumerate(zip(POLICIES, fired, strict=True))
    )
    return Truth(dates=calendar.dates, districts=codes, infections=res.infections,
                 rt=res.rt, generation_interval=res.generation_interval,
                 importations=res.importations, susceptible=res.susceptible,
                 exposed=res.exposed, infectious=res.infectious, recovered=res.recovered,
                 transmission=calendar.seasonal * calendar.variant * _policy_curve(days, fired),
                 policy=_policy_curve(days, fired), population=pop, policy_dates=policy_dates,
                 transmission_changes=changes)
