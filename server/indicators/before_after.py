"""Transmission before and after a dated event: growth rates, R and their change, per event.

An event on day ``e`` (a tier change, a measure that starts or ends, school holidays, a change
of testing criteria) can only show in *reported* cases after the delay from infection to report.
The windows are therefore shifted by that delay:

- before: report days ``[e + delay - lead - window, e + delay - lead)`` — infections before
  the event (``lead`` days left out for the short end of the delay);
- after: report days ``[e + delay + transition, e + delay + transition + window)`` — infections
  after the event, once the spread of the delay has passed (``transition`` days are left out).

Both windows are fitted together as one log-linear Poisson model with a level and a slope per
window and, optionally, six day-of-week effects shared by both windows; the quasi-Poisson
dispersion scales the covariance. The slopes are the growth rates ``r_before`` and ``r_after``.
Until the series reaches the after window's last day the answer is "too early to tell", with the
date (day index) from which it can be told.

Defaults and their sources:

- ``delay = 7`` days: incubation median 5.1 days (Lauer et al. 2020, Ann Intern Med 172:577),
  rounded to 5, plus 2 days from onset to report (common practice, no source; set it to the
  office's own reporting delay, e.g. from :func:`server.indicators.nowcast.estimate_delay`).
- ``transition = 7`` days: the 97.5th percentile of the incubation period, 11.5 days, less its
  median 5.1 (Lauer et al. 2020), rounded up: most infections after the event are reported by then.
- ``lead = 3`` days: the median 5.1 less the 2.5th percentile of a log-normal with that median
  and 97.5th percentile (5.1^2 / 11.5 = 2.26 days), rounded: reports before ``e + delay - lead``
  are almost all of infections before the event. Measured in ``bench/before_after_validation.py``
  (renewal scenario): without it the before window's coverage fell to 0.65.
- ``window = 14`` days: two full weeks, so each weekday appears twice per window (common
  practice, no source).
- serial interval gamma mean 4.7, sd 2.9 days (Nishiura et al. 2020, Int J Infect Dis 93:284;
  [memory of which fit]) for R through Wallinga & Lipsitch (2007).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from server.indicators._arrays import (
    FloatArray,
    IntArray,
    as_nonnegative_counts,
    check_level,
    check_positive,
    check_window,
    freeze_arrays,
)
from server.indicators.serial_interval import growth_to_reproduction

__all__ = [
    "DEFAULT_DELAY",
    "DEFAULT_LEAD",
    "DEFAULT_TRANSITION",
    "DEFAULT_WINDOW",
    "STATUSES",
    "BeforeAfter",
    "before_after",
    "event_design",
]

DEFAULT_DELAY = 7
DEFAULT_TRANSITION = 7
DEFAULT_LEAD = 3
DEFAULT_WINDOW = 14

#: ``ready``: estimated; ``too_early``: the after window is not yet reported in full;
#: ``no_history``: the before window starts before the series; ``unfit``: too many missing days,
#: or a window or weekday without any case (the likelihood has no maximum).
STATUSES = ("ready", "too_early", "no_history", "unfit")
Status = Literal["ready", "too_early", "no_history", "unfit"]

_MAX_ITER = 100
_TOL = 1e-10  # relative change of the deviance, as server.indicators.growth


@dataclass(frozen=True, eq=False)
class BeforeAfter:
    """Estimates per event; arrays shaped (events,), NaN where ``status`` is not ``ready``.

    Attributes
    ----------
    status : ndarray of str
        One of :data:`STATUSES`.
    before_start, after_start, after_end : ndarray of int
        Day index of the first day of each window, and one past the after window's last day.
    ready_day : ndarray of int
        First day index on which the after window's last day is in the series: the estimate can
        be told from then (``after_end - 1``).
    r_before, r_before_lower, r_before_upper, r_after, r_after_lower, r_after_upper : ndarray
        Growth rate per day in each window with its Wald interval.
    r_change, r_change_lower, r_change_upper : ndarray
        ``r_after - r_before`` with its Wald interval (covariance of the joint fit).
    rt_before, rt_before_lower, rt_before_upper, rt_after, rt_after_lower, rt_after_upper : ndarray
        R from each growth rate and its interval ends (monotone map).
    rt_ratio, rt_ratio_lower, rt_ratio_upper : ndarray
        ``R_after / R_before`` with a delta-method interval on the log scale.
    std_error_change, dispersion : ndarray
        Standard error of ``r_change``; the dispersion used (after clamping, if asked).
    """

    status: NDArray[np.str_]
    before_start: IntArray
    after_start: IntArray
    after_end: IntArray
    ready_day: IntArray
    r_before: FloatArray
    r_before_lower: FloatArray
    r_before_upper: FloatArray
    r_after: FloatArray
    r_after_lower: FloatArray
    r_after_upper: FloatArray
    r_change: FloatArray
    r_change_lower: FloatArray
    r_change_upper: FloatArray
    std_error_change: FloatArray
    rt_before: FloatArray
    rt_before_lower: FloatArray
    rt_before_upper: FloatArray
    rt_after: FloatArray
    rt_after_lower: FloatArray
    rt_after_upper: FloatArray
    rt_ratio: FloatArray
    rt_ratio_lower: FloatArray
    rt_ratio_upper: FloatArray
    dispersion: FloatArray
    window: int
    delay: int
    transition: int
    lead: int
    level: float

    def __post_init__(self) -> None:
        freeze_arrays(self)


def event_design(
    first_day: ArrayLike, window: int, gap: int, *, day_of_week: bool = True
) -> FloatArray:
    """Design matrices (events, 2 * window, p) of the joint before/after fit.

    Columns: before level, after level, before slope, after slope (days from each window's
    centre), then six day-of-week indicators (weekday of the absolute day index, Monday-free
    baseline = index mod 7 == 0) when ``day_of_week``. Rows: the before window's days, then the
    after window's, the after window starting ``window + gap`` days after the before window.
    """
    first = np.atleast_1d(np.asarray(first_day, dtype=np.int64))
    n = 2 * window
    offsets = np.concatenate([np.arange(window), window + gap + np.arange(window)])
    centred = np.arange(window) - (window - 1) / 2.0
    base = np.zeros((n, 4))
    base[:window, 0] = 1.0
    base[window:, 1] = 1.0
    base[:window, 2] = centred
    base[window:, 3] = centred
    design = np.broadcast_to(base, (first.size, n, 4))
    if not day_of_week:
        return np.ascontiguousarray(design)
    weekday = (first[:, None] + offsets[None, :]) % 7
    dow = (weekday[:, :, None] == np.arange(1, 7)[None, None, :]).astype(np.float64)
    return np.concatenate([design, dow], axis=2)


def _irls(y: FloatArray, mask: FloatArray, x: FloatArray) -> tuple[FloatArray, FloatArray,
                                                                     FloatArray, NDArray[np.bool_]]:
    """Batched Poisson IRLS (log link). Returns beta, (X^T W X)^-1, mu and convergence."""
    e, n, p = x.shape
    mu = np.where(mask > 0, (y + y.sum(axis=1, keepdims=True) / np.maximum(
        mask.sum(axis=1, keepdims=True), 1.0)) / 2.0, 1.0)
    eta = np.log(mu)
    beta = np.zeros((e, p))
    converged = np.zeros(e, dtype=bool)
    ylogy = np.where(y > 0, y * np.log(np.where(y > 0, y, 1.0)), 0.0)
    dev_old = np.full(e, np.inf)
    xtwx = np.repeat(np.eye(p)[None], e, axis=0)
    for _ in range(_MAX_ITER):
        w = mask * mu
        z = eta + (y - mu) / mu
        xtwx = np.einsum("enp,en,enq->epq", x, w, x)
        xtwz = np.einsum("enp,en->ep", x, w * z)
        beta = np.linalg.solve(xtwx, xtwz[..., None])[..., 0]
        eta = np.einsum("enp,ep->en", x, beta)
        mu = np.exp(eta)
        dev = 2.0 * (mask * (ylogy - y * eta - (y - mu))).sum(axis=1)
        converged |= np.abs(dev - dev_old) <= _TOL * (np.abs(dev) + 1.0)
        if converged.all():
            break
        dev_old = dev
    w = mask * mu
    xtwx = np.einsum("enp,en,enq->epq", x, w, x)
    return beta, np.linalg.inv(xtwx), mu, converged


def before_after(
    counts: ArrayLike,
    region: ArrayLike,
    day: ArrayLike,
    *,
    window: int = DEFAULT_WINDOW,
    delay: int = DEFAULT_DELAY,
    transition: int = DEFAULT_TRANSITION,
    lead: int = DEFAULT_LEAD,
    day_of_week: bool = True,
    dispersion: Literal["quasipoisson", "poisson"] = "quasipoisson",
    clamp_dispersion: bool = True,
    level: float = 0.95,
    max_missing: int = 2,
    si_mean: float = 4.7,
    si_sd: float = 2.9,
) -> BeforeAfter:
    """Growth rate and R before and after each event, and their change with intervals.

    Parameters
    ----------
    counts : array_like, shape (regions, days)
        Daily reported counts; NaN marks a missing day (left out of the fit).
    region, day : array_like of int, shape (events,)
        Row of ``counts`` and day index of each event (the day the measure took effect; may lie
        before or after the series).
    window : int, default 14
        Days in each window (at least 7; 10 parameters need 2 * window > 10).
    delay : int, default 7
        Days from infection to report (see the module notes for the default's source).
    transition : int, default 7
        Days after ``event + delay`` left out before the after window begins.
    lead : int, default 3
        Days before ``event + delay`` left out after the before window ends.
    day_of_week : bool, default True
        Six day-of-week effects shared by both windows.
    dispersion : {"quasipoisson", "poisson"}
        Scale the covariance by the Pearson dispersion of the joint fit, or not.
    clamp_dispersion : bool, default True
        Use ``max(phi, 1)`` (common practice, no source; as :func:`growth_rate`).
    level : float, default 0.95
        Level of every interval.
    max_missing : int, default 2
        Most missing days tolerated in each window.
    si_mean, si_sd : float
        Gamma serial (generation) interval for R (Nishiura et al. 2020, [memory of which fit]).

    Returns
    -------
    BeforeAfter

    Notes
    -----
    Model, for report day t in window w in {before, after}:

    .. math:: \\log \\mu_t = a_w + r_w (t - c_w) + \\delta_{\\mathrm{dow}(t)}, \\quad
              y_t \\sim \\text{quasi-Poisson}(\\mu_t, \\phi \\mu_t)

    fitted by IRLS (McCullagh & Nelder 1989, 2.5), covariance
    :math:`\\hat\\phi (X^T W X)^{-1}` with the Pearson :math:`\\hat\\phi` on ``n - p`` degrees of
    freedom (4.5); with an estimated dispersion the intervals use Student's t on ``n - p``
    degrees of freedom (as R's ``summary.glm`` for quasi families), otherwise the normal.
    The change :math:`\\Delta r = r_a - r_b` has variance
    :math:`V_{aa} + V_{bb} - 2 V_{ab}`. R is :math:`1/M(-r) = (1 + r\\theta)^k` for the gamma
    interval of shape k and scale θ (Wallinga & Lipsitch 2007, eq. 2.7); the log ratio
    :math:`\\log R_a - \\log R_b` has gradient :math:`g(r) = k\\theta / (1 + r\\theta)` in each r,
    and the delta-method variance :math:`g_a^2 V_{aa} + g_b^2 V_{bb} - 2 g_a g_b V_{ab}`.

    References
    ----------
    .. [1] McCullagh, P., Nelder, J. A. (1989). Generalized Linear Models, 2nd ed.
    .. [2] Wallinga, J., Lipsitch, M. (2007). Proc R Soc B 274:599–604.
    .. [3] Lauer, S. A. et al. (2020). The incubation period of coronavirus disease 2019.
       Ann Intern Med 172:577–582.
    """
    arr = as_nonnegative_counts("counts", counts)
    window = check_window("window", window, minimum=7)
    level = check_level("level", level)
    for name, value in (("delay", delay), ("transition", transition), ("lead", lead)):
        if int(value) != value or value < 0:
            raise ValueError(f"{name}: expected a whole number of days >= 0, got {value!r}")
    delay, transition, lead = int(delay), int(transition), int(lead)
    if dispersion not in ("quasipoisson", "poisson"):
        raise ValueError(f"dispersion: expected quasipoisson or poisson, got {dispersion!r}")
    if int(max_missing) != max_missing or not 0 <= max_missing < window // 2:
        raise ValueError(f"max_missing: expected 0 <= max_missing < {window // 2}, "
                         f"got {max_missing!r}")
    check_positive("si_mean", si_mean)
    check_positive("si_sd", si_sd)
    rows = np.atleast_1d(np.asarray(region, dtype=np.int64))
    days_idx = np.atleast_1d(np.asarray(day, dtype=np.int64))
    if rows.shape != days_idx.shape or rows.ndim != 1:
        raise ValueError(f"region, day: expected two 1-D arrays of one length, got "
                         f"{rows.shape} and {days_idx.shape}")
    n_regions, n_days = arr.shape
    if rows.size and (rows.min() < 0 or rows.max() >= n_regions):
        raise ValueError(f"region: row indices must lie in 0..{n_regions - 1}")

    e = rows.size
    before_start = days_idx + delay - lead - window
    after_start = days_idx + delay + transition
    after_end = after_start + window
    ready_day = after_end - 1
    status = np.full(e, "ready", dtype="<U10")
    status[before_start < 0] = "no_history"
    status[(status == "ready") & (ready_day > n_days - 1)] = "too_early"

    nan = np.full(e, np.nan)
    out = {k: nan.copy() for k in (
        "r_before", "r_before_lower", "r_before_upper", "r_after", "r_after_lower",
        "r_after_upper", "r_change", "r_change_lower", "r_change_upper", "std_error_change",
        "rt_before", "rt_before_lower", "rt_before_upper", "rt_after", "rt_after_lower",
        "rt_after_upper", "rt_ratio", "rt_ratio_lower", "rt_ratio_upper", "dispersion")}
    fit = np.flatnonzero(status == "ready")
    if fit.size:
        gap = lead + transition
        offsets = np.concatenate([np.arange(window), window + gap + np.arange(window)])
        cols = before_start[fit, None] + offsets[None, :]
        y_raw = arr[rows[fit, None], cols]
        present = np.isfinite(y_raw)
        y = np.where(present, y_raw, 0.0)
        mask = present.astype(np.float64)
        x = event_design(before_start[fit], window, gap, day_of_week=day_of_week)
        missing_b = (~present[:, :window]).sum(axis=1)
        missing_a = (~present[:, window:]).sum(axis=1)
        ok = (missing_b <= max_missing) & (missing_a <= max_missing)
        ok &= (y[:, :window].sum(axis=1) > 0) & (y[:, window:].sum(axis=1) > 0)
        if day_of_week:
            weekday = (before_start[fit, None] + offsets[None, :]) % 7
            for d in range(7):
                ok &= ((y * (weekday == d)).sum(axis=1) > 0)
        status[fit[~ok]] = "unfit"
        good = fit[ok]
        if good.size:
            yg, mg, xg = y[ok], mask[ok], x[ok]
            beta, inv, mu, conv = _irls(yg, mg, xg)
            p = xg.shape[2]
            n_obs = mg.sum(axis=1)
            pearson = (mg * (yg - mu) ** 2 / mu).sum(axis=1) / (n_obs - p)
            if dispersion == "poisson":
                phi = np.ones_like(pearson)
            else:
                phi = np.maximum(pearson, 1.0) if clamp_dispersion else pearson
            cov = phi[:, None, None] * inv
            if dispersion == "poisson":
                z = np.full(phi.shape, stats.norm.ppf(0.5 + level / 2.0))
            else:  # estimated dispersion: Student t on n - p degrees of freedom
                z = stats.t.ppf(0.5 + level / 2.0, n_obs - p)
            rb, ra = beta[:, 2], beta[:, 3]
            vbb, vaa, vab = cov[:, 2, 2], cov[:, 3, 3], cov[:, 2, 3]
            se_b, se_a = np.sqrt(vbb), np.sqrt(vaa)
            diff = ra - rb
            se_d = np.sqrt(np.maximum(vaa + vbb - 2.0 * vab, 0.0))
            shape, scale = (si_mean / si_sd) ** 2, si_sd**2 / si_mean
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                ga, gb = shape * scale / (1.0 + ra * scale), shape * scale / (1.0 + rb * scale)
                se_log = np.sqrt(np.maximum(ga**2 * vaa + gb**2 * vbb - 2 * ga * gb * vab, 0.0))
                rt_b = growth_to_reproduction(rb, si_mean, si_sd)
                rt_a = growth_to_reproduction(ra, si_mean, si_sd)
                log_ratio = np.log(rt_a) - np.log(rt_b)
                ratio_lo = np.exp(log_ratio - z * se_log)
                ratio_hi = np.exp(log_ratio + z * se_log)
            values = {
                "r_before": rb, "r_before_lower": rb - z * se_b, "r_before_upper": rb + z * se_b,
                "r_after": ra, "r_after_lower": ra - z * se_a, "r_after_upper": ra + z * se_a,
                "r_change": diff, "r_change_lower": diff - z * se_d,
                "r_change_upper": diff + z * se_d, "std_error_change": se_d,
                "rt_before": rt_b,
                "rt_before_lower": growth_to_reproduction(rb - z * se_b, si_mean, si_sd),
                "rt_before_upper": growth_to_reproduction(rb + z * se_b, si_mean, si_sd),
                "rt_after": rt_a,
                "rt_after_lower": growth_to_reproduction(ra - z * se_a, si_mean, si_sd),
                "rt_after_upper": growth_to_reproduction(ra + z * se_a, si_mean, si_sd),
                "rt_ratio": np.exp(log_ratio), "rt_ratio_lower": ratio_lo,
                "rt_ratio_upper": ratio_hi, "dispersion": phi,
            }
            bad = ~conv | ~np.isfinite(diff)
            for key, val in values.items():
                out[key][good] = np.where(bad, np.nan, val)
            status[good[bad]] = "unfit"
    return BeforeAfter(
        status=status, before_start=before_start, after_start=after_start, after_end=after_end,
        ready_day=ready_day, **out, window=window, delay=delay, transition=transition,
        lead=lead, level=level,
    )
