"""Nowcasting a delayed series from its vintages with a chain-ladder reporting-delay model.

The reporting triangle is shaped ``(regions, ref_days, delays)``: ``triangle[r, i, d]`` is the
*cumulative* value for reference day ``i`` known ``d`` days after it (delay 0 = same day), NaN
where that cell is not yet observable (``i + d`` after the last vintage) or was never reported.
The last delay column is treated as complete: later revisions are outside the model.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy import stats

from server.indicators._arrays import FloatArray, check_level, check_window


@dataclass(frozen=True, eq=False)
class DelayEstimate:
    """Chain-ladder development factors and the reporting-delay distribution they imply.

    ``factors[r, d]`` = f_d, the ratio of the cumulative value at delay d+1 to delay d
    (shape (regions, delays - 1)); ``reported[r, d]`` = share of the final value known by delay d;
    ``pmf[r, d]`` = share first reported at delay d; ``pairs[r, d]`` = reference days used for f_d.
    """

    factors: FloatArray
    reported: FloatArray
    pmf: FloatArray
    pairs: FloatArray


@dataclass(frozen=True, eq=False)
class Nowcast:
    """Nowcast of the final value of every reference day, with a predictive interval.

    ``estimate``/``lower``/``upper`` shaped (regions, ref_days); ``known`` the latest known
    value, ``delay`` the delay at which it was known, ``reported`` the estimated share already
    known (1 for complete days), ``delays`` the delay model used.
    """

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    known: FloatArray
    delay: FloatArray
    reported: FloatArray
    delays: DelayEstimate
    level: float


def as_triangle(name: str, values: ArrayLike) -> FloatArray:
    """Return a float array shaped (regions, ref_days, delays); a 2-D input is one region."""
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim == 2:
        arr = arr[np.newaxis]
    if arr.ndim != 3 or arr.shape[2] < 2:
        raise ValueError(
            f"{name}: expected shape (regions, ref_days, delays >= 2), got {arr.shape}"
        )
    if np.isinf(arr).any():
        raise ValueError(f"{name}: contains infinite values")
    with np.errstate(invalid="ignore"):
        negative = arr < 0
    if negative.any():
        first = tuple(int(i) for i in np.argwhere(negative)[0])
        raise ValueError(f"{name}: negative count {arr[first]} at index {first}")
    return arr


def cumulative_triangle(increments: ArrayLike) -> FloatArray:
    """Turn counts first reported at delay d into cumulative values; NaN cells stay NaN."""
    inc = as_triangle("increments", increments)
    out = np.nancumsum(inc, axis=2)
    out[np.isnan(inc)] = np.nan
    return out


def estimate_delay(triangle: ArrayLike, *, window: int | None = None) -> DelayEstimate:
    """Chain-ladder development factors from the observed cells of the reporting triangle.

    Parameters
    ----------
    triangle : array_like, shape (regions, ref_days, delays)
        Cumulative values by delay, NaN where not observable.
    window : int, optional
        Use only the last ``window`` reference days (the delay distribution drifts over time).

    Returns
    -------
    DelayEstimate

    Notes
    -----
    Over the reference days :math:`i` observed at both delays :math:`d` and :math:`d+1`:

    .. math:: \\hat f_d = \\sum_i C_{i,d+1} / \\sum_i C_{i,d}

    :math:`\\hat f_d = 1` when both sums are 0, NaN when no day has both cells or the
    denominator alone is 0. The share known by delay :math:`d` is
    :math:`q_d = 1 / \\prod_{k \\ge d} \\hat f_k` (:math:`q_{D-1} = 1`).

    References
    ----------
    Mack T (1993). Distribution-free calculation of the standard error of chain ladder reserve
    estimates. ASTIN Bull 23:213-225.
    """
    c = as_triangle("triangle", triangle)
    if window is not None:
        window = check_window("window", window, minimum=2)
        c = c[:, -window:, :]
    head, tail = c[:, :, :-1], c[:, :, 1:]
    both = np.isfinite(head) & np.isfinite(tail)
    num = np.where(both, tail, 0.0).sum(axis=1)
    den = np.where(both, head, 0.0).sum(axis=1)
    pairs = both.sum(axis=1).astype(np.float64)
    factors = np.divide(num, den, out=np.full_like(num, np.nan), where=den > 0)
    factors = np.where((den == 0) & (num == 0) & (pairs > 0), 1.0, factors)
    ones = np.ones((c.shape[0], 1))
    growth = np.cumprod(np.concatenate([factors, ones], axis=1)[:, ::-1], axis=1)[:, ::-1]
    reported = np.divide(1.0, growth, out=np.full_like(growth, np.nan), where=growth > 0)
    pmf = np.diff(reported, axis=1, prepend=0.0)
    return DelayEstimate(factors=factors, reported=reported, pmf=pmf, pairs=pairs)


def nowcast(
    triangle: ArrayLike,
    *,
    level: float = 0.95,
    window: int | None = None,
    prior_shape: float = 0.5,
) -> Nowcast:
    """Nowcast the final values of the recent, still incomplete reference days.

    Parameters
    ----------
    triangle : array_like, shape (regions, ref_days, delays)
        Cumulative values by delay, NaN where not observable.
    level : float
        Level of the predictive interval.
    window : int, optional
        Reference days used to estimate the delay factors (default: all).
    prior_shape : float
        Shape of the gamma prior on a day's expected final count (0.5 = Jeffreys).

    Returns
    -------
    Nowcast

    Notes
    -----
    For reference day :math:`i` let :math:`C_i` be the latest finite cell, at delay
    :math:`d_i`, and :math:`q = q_{d_i}` the share known by then. The point estimate is the
    chain ladder :math:`\\hat N_i = C_i / q = C_i \\prod_{k \\ge d_i} \\hat f_k`.

    For the interval, cases are reported by independent thinning, so :math:`C_i \\sim
    \\text{Poisson}(\\lambda q)` and the unreported part :math:`U_i \\sim
    \\text{Poisson}(\\lambda (1-q))` independently. With a gamma(:math:`a`) prior on
    :math:`\\lambda`, :math:`\\lambda \\mid C_i \\sim \\Gamma(C_i + a, \\text{rate } q)`, hence
    :math:`U_i \\mid C_i \\sim \\text{NegBin}(C_i + a, q)` and the interval is
    :math:`C_i` plus its quantiles. The factors are taken as known (good when the window holds
    many reports); a share :math:`q \\ge 1` (downward revisions) gives a zero-width interval.

    References
    ----------
    Mack T (1993). ASTIN Bull 23:213-225 (chain-ladder estimator).
    Höhle M, an der Heiden M (2014). Bayesian nowcasting during the STEC O104:H4 outbreak in
    Germany, 2011. Biometrics 70:993-1002 (nowcasting as a reporting-triangle problem).
    """
    c = as_triangle("triangle", triangle)
    level = check_level("level", level)
    if not prior_shape > 0:
        raise ValueError(f"prior_shape: must be positive, got {prior_shape!r}")
    delays = estimate_delay(c, window=window)
    regions, days, width = c.shape
    finite = np.isfinite(c)
    any_known = finite.any(axis=2)
    last = width - 1 - np.argmax(finite[:, :, ::-1], axis=2)
    known = np.take_along_axis(c, last[..., np.newaxis], axis=2)[..., 0]
    known = np.where(any_known, known, np.nan)
    share = np.take_along_axis(delays.reported, last.reshape(regions, -1), axis=1)
    share = np.where(any_known, share.reshape(regions, days), np.nan)
    estimate = np.divide(known, share, out=np.full_like(known, np.nan), where=share > 0)
    q = np.clip(np.where(np.isfinite(share), share, 1.0), 1e-12, 1.0)
    size = np.where(np.isfinite(known), known, 0.0) + prior_shape
    alpha = 1.0 - level
    open_ = q < 1.0
    lo_u = np.where(open_, stats.nbinom.ppf(alpha / 2, size, np.where(open_, q, 0.5)), 0.0)
    hi_u = np.where(open_, stats.nbinom.ppf(1 - alpha / 2, size, np.where(open_, q, 0.5)), 0.0)
    lower = np.minimum(known + lo_u, estimate)
    upper = np.maximum(known + hi_u, estimate)
    bad = ~np.isfinite(estimate)
    lower[bad] = np.nan
    upper[bad] = np.nan
    return Nowcast(
        estimate=estimate,
        lower=lower,
        upper=upper,
        known=known,
        delay=np.where(any_known, last, np.nan).astype(np.float64),
        reported=share,
        delays=delays,
        level=level,
    )


def triangle_from_vintages(
    table: pd.DataFrame,
    *,
    delays: int,
    regions: list[str] | None = None,
    ref_dates: pd.DatetimeIndex | None = None,
    as_of: pd.Timestamp | None = None,
    region_col: str = "region",
) -> FloatArray:
    """Build the cumulative reporting triangle from a long table of vintages.

    Parameters
    ----------
    table : DataFrame
        Columns ``ref_date``, ``known_on`` (dates) and ``value`` (the cumulative value known for
        ``ref_date`` as of ``known_on``), plus ``region_col`` when there are several regions.
    delays : int
        Number of delay columns D (delays 0..D-1); vintages later than D-1 days are ignored.
    regions : list of str, optional
        Region order (default: sorted unique values; one unnamed region without the column).
    ref_dates : DatetimeIndex, optional
        Reference days (default: every day from the first to the last ``ref_date``).
    as_of : Timestamp, optional
        Last vintage date (default: the latest ``known_on``); cells after it are NaN.

    Returns
    -------
    ndarray, shape (regions, ref_days, delays)

    Notes
    -----
    Cell :math:`(i, d)` holds the value of the latest vintage with
    :math:`\\text{known\\_on} \\le \\text{ref\\_date}_i + d`; NaN before the first vintage of that
    day and after ``as_of``.
    """
    delays = check_window("delays", delays, minimum=2)
    missing = {"ref_date", "known_on", "value"} - set(table.columns)
    if missing:
        raise ValueError(f"table: missing columns {sorted(missing)}")
    df = table.copy()
    df["ref_date"] = pd.to_datetime(df["ref_date"]).dt.normalize()
    df["known_on"] = pd.to_datetime(df["known_on"]).dt.normalize()
    if region_col not in df.columns:
        df[region_col] = ""
    delay = (df["known_on"] - df["ref_date"]).dt.days
    if (delay < 0).any():
        bad = df.loc[delay < 0].iloc[0]
        raise ValueError(f"table: known_on {bad['known_on']} before ref_date {bad['ref_date']}")
    if as_of is None:
        as_of = df["known_on"].max()
    as_of = pd.Timestamp(as_of).normalize()
    df = df.assign(delay=delay).loc[(delay < delays) & (df["known_on"] <= as_of)]
    if regions is None:
        regions = sorted(df[region_col].unique().tolist())
    if ref_dates is None:
        ref_dates = pd.date_range(df["ref_date"].min(), df["ref_date"].max(), freq="D")
    out = np.full((len(regions), len(ref_dates), delays), np.nan)
    df = df.sort_values("known_on", kind="stable").drop_duplicates(
        [region_col, "ref_date", "delay"], keep="last"
    )
    r = pd.Index(regions).get_indexer(df[region_col])
    i = pd.Index(ref_dates).get_indexer(df["ref_date"])
    keep = (r >= 0) & (i >= 0)
    out[r[keep], i[keep], df["delay"].to_numpy()[keep]] = df["value"].to_numpy(float)[keep]
    filled = pd.DataFrame(out.reshape(-1, delays)).ffill(axis=1).to_numpy(copy=True)
    out = filled.reshape(out.shape)
    observable = (as_of - pd.Index(ref_dates)).days.to_numpy()
    out[:, np.arange(delays)[np.newaxis, :] > observable[:, np.newaxis]] = np.nan
    return out
