"""Windowed sums and means over days, and weekly series on ISO or CDC (MMWR) epi weeks.

Every function takes arrays shaped ``(regions, days)`` with NaN on missing days and returns a frozen
dataclass. The rule for windows that contain missing days is the same everywhere in this package:

* a window with more than ``max_missing`` missing days is NaN (refused);
* a window with ``1 .. max_missing`` missing days is *scaled up*: its sum is the mean of the
  observed days times the window length, ``S = (w / n_obs) * sum(observed)``;
* the first ``window - 1`` days of a series have incomplete windows: days before the start of the
  series count as missing, so with the default ``max_missing=0`` they are NaN.

The default ``max_missing=0`` therefore gives exact sums or NaN, never a guess. Scaled sums are not
integers; indicator modules that need counts (exact Poisson, Wilson) work on the observed count and
carry the scale factor ``w / n_obs`` separately.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Literal

import numpy as np
from epiweeks import Week
from numpy.typing import ArrayLike

from server.indicators._arrays import (
    FloatArray,
    IntArray,
    as_regions_days,
    check_max_missing,
    check_window,
    freeze_arrays,
    windowed_total,
)

WeekSystem = Literal["iso", "cdc"]

__all__ = [
    "WeeklySeries",
    "WindowedSeries",
    "rolling_mean",
    "rolling_sum",
    "weekly_sum",
]


@dataclass(frozen=True, eq=False)
class WindowedSeries:
    """A trailing-window statistic attached to the window's last day.

    Attributes
    ----------
    values : ndarray, shape (regions, days)
        The windowed sum (scaled for tolerated missing days) or mean; NaN where refused.
    observed : ndarray of int, shape (regions, days)
        Number of observed (non-NaN) days in each window.
    window : int
        Window length in days.
    max_missing : int
        Most missing days a window may contain and still be reported.
    statistic : {"sum", "mean"}
        Which statistic ``values`` holds.
    """

    values: FloatArray
    observed: IntArray
    window: int
    max_missing: int
    statistic: Literal["sum", "mean"]

    def __post_init__(self) -> None:
        freeze_arrays(self)


@dataclass(frozen=True, eq=False)
class WeeklySeries:
    """Daily values summed into epi weeks.

    Attributes
    ----------
    values : ndarray, shape (regions, weeks)
        Weekly sums (scaled for tolerated missing days); NaN where refused.
    observed : ndarray of int, shape (regions, weeks)
        Observed days in each week (days outside the series count as missing).
    labels : tuple of str
        Week labels from :mod:`epiweeks`: ``"2021W05"`` (ISO) or ``"202105"`` (CDC).
    years, weeks : ndarray of int, shape (weeks,)
        Epi year and week number of each column.
    start_dates : tuple of datetime.date
        First day of each week (Monday for ISO, Sunday for CDC/MMWR).
    system : {"iso", "cdc"}
        Week convention.
    max_missing : int
        Most missing days a week may contain and still be reported.
    """

    values: FloatArray
    observed: IntArray
    labels: tuple[str, ...]
    years: IntArray
    weeks: IntArray
    start_dates: tuple[dt.date, ...]
    system: WeekSystem
    max_missing: int

    def __post_init__(self) -> None:
        freeze_arrays(self)


def rolling_sum(values: ArrayLike, window: int = 7, *, max_missing: int = 0) -> WindowedSeries:
    """Trailing-window sums attached to the window's last day.

    Parameters
    ----------
    values : array_like, shape (regions, days) or (days,)
        Daily values; NaN marks a missing day.
    window : int, default 7
        Window length in days (7 and 14 are the usual choices).
    max_missing : int, default 0
        Windows with more missing days are NaN; windows with fewer are scaled up.

    Returns
    -------
    WindowedSeries
        ``statistic == "sum"``.

    Notes
    -----
    For the window ending on day t, with O_t the observed days in ``[t - w + 1, t]`` and
    ``n_t = |O_t|``:

    .. math:: S_t = \\frac{w}{n_t} \\sum_{s \\in O_t} x_s \\quad \\text{if } w - n_t \\le m,
              \\text{ else NaN.}

    Scaling assumes the missing days resemble the observed ones (missing at random within the
    window); that is why the default refuses any missing day. Scaling the observed period to the
    full window is common practice, no single source.

    References
    ----------
    .. [1] Rothman, K. J., Greenland, S., Lash, T. L. (2008). Modern Epidemiology, 3rd ed., ch. 3
       (incidence as events over the observed time at risk).
    """
    arr = as_regions_days("values", values)
    window = check_window("window", window)
    max_missing = check_max_missing(max_missing, window)
    total, factor, count = windowed_total(arr, window, max_missing)
    return WindowedSeries(total * factor, count, window, max_missing, "sum")


def rolling_mean(values: ArrayLike, window: int = 7, *, max_missing: int = 0) -> WindowedSeries:
    """Trailing-window means of the observed days, attached to the window's last day.

    Parameters
    ----------
    values : array_like, shape (regions, days) or (days,)
        Daily values; NaN marks a missing day.
    window : int, default 7
        Window length in days.
    max_missing : int, default 0
        Windows with more missing days are NaN.

    Returns
    -------
    WindowedSeries
        ``statistic == "mean"``; equals :func:`rolling_sum` divided by ``window``.

    Notes
    -----
    .. math:: \\bar x_t = \\frac{1}{n_t} \\sum_{s \\in O_t} x_s \\quad \\text{if } w - n_t \\le m.

    References
    ----------
    .. [1] Rothman, K. J., Greenland, S., Lash, T. L. (2008). Modern Epidemiology, 3rd ed., ch. 3.
    """
    arr = as_regions_days("values", values)
    window = check_window("window", window)
    max_missing = check_max_missing(max_missing, window)
    total, factor, count = windowed_total(arr, window, max_missing)
    return WindowedSeries(total * factor / window, count, window, max_missing, "mean")


def _check_system(system: str) -> WeekSystem:
    if system not in ("iso", "cdc"):
        raise ValueError(f"system: must be 'iso' or 'cdc', got {system!r}")
    return system  # type: ignore[return-value]


def weekly_sum(
    values: ArrayLike,
    start: dt.date,
    *,
    system: WeekSystem = "iso",
    max_missing: int = 0,
) -> WeeklySeries:
    """Sum daily values into ISO (Monday–Sunday) or CDC/MMWR (Sunday–Saturday) epi weeks.

    Parameters
    ----------
    values : array_like, shape (regions, days) or (days,)
        Daily values, column 0 being the date ``start``; NaN marks a missing day.
    start : datetime.date
        Date of the first column.
    system : {"iso", "cdc"}, default "iso"
        Week convention, labelled with the :mod:`epiweeks` library.
    max_missing : int, default 0
        Weeks with more missing days (including days outside the series at either edge) are NaN;
        weeks with fewer are scaled up by ``7 / n_obs``.

    Returns
    -------
    WeeklySeries

    Notes
    -----
    Weeks are consecutive 7-day blocks aligned on Monday (ISO 8601) or Sunday (MMWR). Week 1 is
    the week containing 4 January (ISO) or the first week with at least 4 days in January (MMWR);
    epiweeks supplies the numbering. The weekly sum is
    :math:`W_j = \\frac{7}{n_j} \\sum_{s \\in O_j} x_s` when :math:`7 - n_j \\le m`.

    References
    ----------
    .. [1] ISO 8601-1:2019, Date and time, clause 3.1.1.23 (calendar week).
    .. [2] CDC, MMWR week fact sheet (epidemiological week definition, Sunday to Saturday).
    """
    arr = as_regions_days("values", values)
    if not isinstance(start, dt.date) or isinstance(start, dt.datetime):
        raise ValueError(f"start: must be a datetime.date, got {start!r}")
    system = _check_system(system)
    max_missing = check_max_missing(max_missing, 7)
    regions, days = arr.shape
    first_week = Week.fromdate(start, system=system)
    lead = (start - first_week.startdate()).days
    n_weeks = -(-(lead + days) // 7)
    padded = np.full((regions, n_weeks * 7), np.nan)
    padded[:, lead : lead + days] = arr
    blocks = padded.reshape(regions, n_weeks, 7)
    observed = (~np.isnan(blocks)).sum(axis=2).astype(np.int64)
    total = np.where(np.isnan(blocks), 0.0, blocks).sum(axis=2)
    refused = observed < 7 - max_missing
    with np.errstate(divide="ignore", invalid="ignore"):
        scaled = np.where(refused, np.nan, total * 7.0 / np.maximum(observed, 1))
    week_starts = [first_week.startdate() + dt.timedelta(days=7 * j) for j in range(n_weeks)]
    week_objs = [Week.fromdate(d, system=system) for d in week_starts]
    return WeeklySeries(
        values=scaled,
        observed=observed,
        labels=tuple(str(w) for w in week_objs),
        years=np.array([w.year for w in week_objs], dtype=np.int64),
        weeks=np.array([w.week for w in week_objs], dtype=np.int64),
        start_dates=tuple(week_starts),
        system=system,
        max_missing=max_missing,
    )
