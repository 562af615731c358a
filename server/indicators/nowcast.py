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
from numpy.typing import ArrayLike, NDArray
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


# -- reporting triangles from stored vintages ------------------------------------------------------


def triangle_from_rows(
    region: ArrayLike,
    ref_day: ArrayLike,
    receipt_day: ArrayLike,
    value: ArrayLike,
    *,
    regions: int,
    days: int,
    delays: int,
    last_receipt: int,
) -> FloatArray:
    """Cumulative reporting triangle ``(regions, days, delays)`` from vintage rows.

    Parameters
    ----------
    region, ref_day, receipt_day : array_like of int
        Row index of the region, index of the reference day and index of the day the row was
        received (same day numbering), one entry per stored row, **in arrival order**.
    value : array_like of float
        The value the row gives for its (region, ref_day): the count known from then on.
    regions, days, delays : int
        Shape of the triangle: delays 0 .. ``delays - 1``.
    last_receipt : int
        The last receipt day the data cover (the cutoff); rows received later are ignored.

    Returns
    -------
    ndarray, shape (regions, days, delays)
        Cell :math:`(r, i, d)` is the value of the newest row of :math:`(r, i)` received by day
        :math:`i + d` (``delays - 1`` collects everything later); NaN before a first row and
        where :math:`i + d` > ``last_receipt`` (not observable yet). A row received before its
        reference day counts from delay 0.
    """
    delays = check_window("delays", delays, minimum=2)
    r = np.asarray(region, dtype=np.int64)
    i = np.asarray(ref_day, dtype=np.int64)
    k = np.asarray(receipt_day, dtype=np.int64)
    v = np.asarray(value, dtype=np.float64)
    if not r.shape == i.shape == k.shape == v.shape:
        raise ValueError("rows: region, ref_day, receipt_day and value differ in length")
    keep = (k <= last_receipt) & (r >= 0) & (r < regions) & (i >= 0) & (i < days)
    r, i, k, v = r[keep], i[keep], k[keep], v[keep]
    d = np.clip(k - i, 0, delays - 1)
    flat = (r * days + i) * delays + d
    # the newest row of each cell: the last one in arrival order
    _, first_of_reversed = np.unique(flat[::-1], return_index=True)
    take = flat.size - 1 - first_of_reversed
    cells = np.full(regions * days * delays, np.nan)
    cells[flat[take]] = v[take]
    out: FloatArray = cells.reshape(regions, days, delays)
    idx = np.where(np.isfinite(out), np.arange(delays), -1)
    np.maximum.accumulate(idx, axis=2, out=idx)
    out = np.where(idx >= 0, np.take_along_axis(out, np.maximum(idx, 0), axis=2), np.nan)
    unobservable = np.arange(days)[:, None] + np.arange(delays)[None, :] > last_receipt
    out[:, unobservable] = np.nan
    return out


def first_reported(triangle: ArrayLike) -> FloatArray:
    """Counts first reported at each delay: the increments of a cumulative triangle.

    ``inc[..., 0] = C[..., 0]`` and ``inc[..., d] = C[..., d] - C[..., d-1]`` (a cell before
    the first report counts as 0); NaN where ``C`` is NaN. Inverse of
    :func:`cumulative_triangle`; negative increments are downward corrections.
    """
    c = np.asarray(triangle, dtype=np.float64)
    if c.ndim == 2:
        c = c[np.newaxis]
    prev = np.concatenate([np.zeros(c.shape[:2] + (1,)), np.nan_to_num(c[..., :-1])], axis=2)
    return c - prev


# -- delay distribution with its uncertainty, pooled for small regions -------------------------

POOL_OWN, POOL_GROUP, POOL_ALL = 0, 1, 2


@dataclass(frozen=True, eq=False)
class DelayModel:
    """Reporting-delay distribution of every region at each cutoff, with its uncertainty.

    Arrays are shaped ``(regions, cutoffs, delays)`` (``reported``, ``log_var``) or
    ``(regions, cutoffs)`` (``pool``, ``reports``). ``reported[..., d]`` = :math:`q_d`, the share
    of a day's final count known by delay d; ``log_var[..., d]`` = Var(log :math:`\\hat q_d`)
    (delta method); ``pool`` says whose reports the estimate rests on (:data:`POOL_OWN`, the
    region's group :data:`POOL_GROUP`, or all regions :data:`POOL_ALL`); ``reports`` how many.
    """

    reported: FloatArray
    log_var: FloatArray
    pool: NDArray[np.int8]
    reports: FloatArray

    def at(self, cutoff: int) -> DelayModel:
        """The model of one cutoff, shaped ``(regions, 1, delays)``."""
        s = slice(cutoff, cutoff + 1)
        return DelayModel(self.reported[:, s], self.log_var[:, s], self.pool[:, s],
                          self.reports[:, s])


def delay_model(
    triangle: ArrayLike,
    *,
    cutoffs: ArrayLike,
    groups: ArrayLike | None = None,
    window: int = 60,
    min_reports: float = 400.0,
    period: int = 1,
) -> DelayModel:
    """Chain-ladder delay distribution at each cutoff, pooled where a region has few reports.

    Parameters
    ----------
    triangle : array_like, shape (regions, days, delays)
        Cumulative triangle over the whole period (:func:`triangle_from_rows`); only cells
        observable at a cutoff are used for it.
    cutoffs : array_like of int
        Receipt days (same numbering as the reference days) the data are known through.
    groups : array_like of int, shape (regions,), optional
        Group of each region (e.g. its parent area); -1 or None: no group.
    window : int
        Reference days before each cutoff whose reports estimate the delays.
    min_reports : float
        A region with fewer reports in the window borrows the delays of its group, and a group
        with fewer those of all regions. Common practice (no source): the shares are binomial,
        400 reports give them a standard error of at most 2.5 points.
    period : int
        Estimate the delays separately for reference days of each residue modulo ``period``
        (7: by weekday, as reports thin out at weekends); a day at delay d uses the
        distribution of the days with its weekday, so ``reported[..., d]`` is that of the
        stratum d mod ``period`` relative to the cutoff. Pooling compares the
        reports per stratum with ``min_reports``.

    Returns
    -------
    DelayModel

    Notes
    -----
    For cutoff :math:`c` the rows are :math:`i \\in [c - W + 1, c - d - 1]`, those observed at
    delay :math:`d + 1`. With :math:`A_d = \\sum_i C_{i,d}` and :math:`B_d = \\sum_i C_{i,d+1}`
    over them, the chain-ladder factor is :math:`\\hat f_d = B_d / A_d` (Mack 1993) and the
    share known by delay :math:`d` is :math:`q_d = \\prod_{k \\ge d} 1 / \\hat f_k`.

    Uncertainty: under the Poisson model of the chain ladder (Renshaw & Verrall 1998), given
    :math:`B_d` the reports that arrived at delay :math:`d+1`, :math:`B_d - A_d`, are binomial
    with the *reverse hazard* :math:`h_{d+1} = 1 - 1/f_d`, independently over :math:`d`. So
    :math:`\\log q_d = \\sum_{k \\ge d} \\log(1 - h_{k+1})` and by the delta method

    .. math:: \\operatorname{Var}\\log\\hat q_d \\approx \\sum_{k \\ge d}
              \\frac{\\tilde h_{k+1}}{(1 - \\tilde h_{k+1})(B_k + 1)},

    with :math:`\\tilde h = (B_k - A_k + 1/2) / (B_k + 1)` (kept inside (0, 1)). A factor
    without reports (:math:`B_d = 0`) is 1 with no variance.

    References
    ----------
    Mack T (1993). ASTIN Bull 23:213-225.
    Renshaw AE, Verrall RJ (1998). A stochastic model underlying the chain-ladder technique.
    British Actuarial Journal 4:903-923.
    """
    c = as_triangle("triangle", triangle)
    window = check_window("window", window, minimum=2)
    period = check_window("period", period)
    if not min_reports >= 0:
        raise ValueError(f"min_reports: must be >= 0, got {min_reports!r}")
    n_regions, days, width = c.shape
    cut = np.atleast_1d(np.asarray(cutoffs, dtype=np.int64))
    grp = (np.full(n_regions, -1, dtype=np.int64) if groups is None
           else np.asarray(groups, dtype=np.int64))
    if grp.shape != (n_regions,):
        raise ValueError(f"groups: expected shape ({n_regions},), got {grp.shape}")
    n_groups = int(grp.max()) + 1 if grp.size else 0
    filled = np.nan_to_num(c)
    pooled = np.zeros((n_groups, days, width))
    if n_groups:
        np.add.at(pooled, grp[grp >= 0], filled[grp >= 0])
    stack = np.concatenate([filled, pooled, filled.sum(axis=0, keepdims=True)], axis=0)
    lo = np.clip(cut - window + 1, 0, days)  # (cutoffs,)
    d = np.arange(width - 1)
    hi = np.clip(cut[:, None] - d[None, :] - 1, -1, days - 1)  # last row of factor d
    hi = np.maximum(hi, lo[:, None] - 1)
    n_pools = stack.shape[0]
    reported = np.empty((n_pools, cut.size, width))
    log_var = np.empty((n_pools, cut.size, width))
    reports = np.zeros((n_pools, cut.size))
    prefix = np.zeros((n_pools, days + 1, width))
    residue = np.arange(days) % period
    for rho in range(period):
        # rows of one residue class of the reference day; a cutoff's stratum s (delays
        # congruent to s) holds the rows i with (cutoff - i) % period == s
        np.cumsum(np.where((residue == rho)[None, :, None], stack, 0.0), axis=1,
                  out=prefix[:, 1:])
        a = prefix[:, hi + 1, d] - prefix[:, lo[:, None], d]  # (pools, cutoffs, delays - 1)
        b = prefix[:, hi + 1, d + 1] - prefix[:, lo[:, None], d + 1]
        reports += b.max(axis=2)
        q_s, lv_s = _chain_ladder(a, b)
        for stratum in range(period):
            at = (cut - stratum) % period == rho
            cols = np.arange(stratum, width, period)
            reported[:, at[:, None] & np.isin(np.arange(width), cols)[None, :]] = q_s[
                :, at][:, :, cols].reshape(n_pools, -1)
            log_var[:, at[:, None] & np.isin(np.arange(width), cols)[None, :]] = lv_s[
                :, at][:, :, cols].reshape(n_pools, -1)
    own = np.arange(n_regions)
    group_row = np.where(grp >= 0, n_regions + grp, stack.shape[0] - 1)
    all_row = stack.shape[0] - 1
    per_stratum = reports / period
    use_own = per_stratum[own] >= min_reports
    use_group = ~use_own & (grp[:, None] >= 0) & (per_stratum[group_row] >= min_reports)
    pool = np.where(use_own, POOL_OWN, np.where(use_group, POOL_GROUP, POOL_ALL)).astype(np.int8)
    row = np.where(use_own, own[:, None], np.where(use_group, group_row[:, None], all_row))
    col = np.arange(cut.size)[None, :]
    return DelayModel(
        reported=reported[row, col], log_var=log_var[row, col], pool=pool,
        reports=reports[row, col],
    )


def _chain_ladder(a: FloatArray, b: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Shares known by each delay and Var(log share) from the factor sums ``a``/``b``
    (``(..., delays - 1)``; see :func:`delay_model`)."""
    ratio = np.where(b > 0, np.divide(a, b, out=np.ones_like(a), where=b > 0), 1.0)
    h = np.clip((b - a + 0.5) / (b + 1.0), 1e-12, 1 - 1e-12)
    v = np.where(b > 0, h / ((1.0 - h) * (b + 1.0)), 0.0)
    ones = np.ones(ratio.shape[:-1] + (1,))
    reported = np.cumprod(np.concatenate([ratio, ones], axis=-1)[..., ::-1], axis=-1)[..., ::-1]
    zeros = np.zeros(v.shape[:-1] + (1,))
    log_var = np.cumsum(np.concatenate([v, zeros], axis=-1)[..., ::-1], axis=-1)[..., ::-1]
    return reported, log_var


# -- nowcast of trailing-window sums ---------------------------------------------------------


@dataclass(frozen=True, eq=False)
class WindowNowcast:
    """Nowcast of each day's final count and of trailing-window sums, shaped (regions, days).

    ``daily`` is a day's nowcast (its reported count where complete); ``estimate`` the window
    sum of ``daily`` with the predictive interval ``lower``/``upper`` of the final window sum;
    ``known`` the window sum reported so far; ``incomplete`` marks days whose expected
    unreported share is at least the threshold and ``nowcast`` the windows holding one;
    ``days`` how many incomplete days each window holds.
    """

    daily: FloatArray
    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    known: FloatArray
    incomplete: NDArray[np.bool_]
    nowcast: NDArray[np.bool_]
    days: FloatArray
    level: float


def _trailing(x: FloatArray, window: int) -> FloatArray:
    """Trailing sums over ``window`` days; NaN while any day of the window is NaN or missing."""
    out = np.full_like(x, np.nan)
    if x.shape[1] < window:
        return out
    c = np.concatenate([np.zeros((x.shape[0], 1)), np.cumsum(x, axis=1)], axis=1)
    out[:, window - 1:] = c[:, window:] - c[:, :-window]
    return out


def nowcast_window(
    values: ArrayLike,
    known_delay: ArrayLike,
    model: DelayModel,
    *,
    window: int = 7,
    level: float = 0.95,
    threshold: float = 0.01,
    prior_shape: float = 0.5,
) -> WindowNowcast:
    """Nowcast the final counts of incomplete days and of the trailing window sums.

    Parameters
    ----------
    values : array_like, shape (regions, days)
        Counts as reported so far; NaN where nothing is known.
    known_delay : array_like of int, shape (regions, days) or (days,)
        The delay (cutoff day minus reference day) at which each value is known.
    model : DelayModel
        Delay model of each region at its cutoff, shaped ``(regions, 1, delays)``.
    window : int
        Window of the sums (7 for a 7-day count; 1 for daily intervals).
    level : float
        Level of the predictive interval.
    threshold : float
        A day is incomplete (nowcast) while :math:`1 - q` is at least this (default 1 %:
        common practice, no source).
    prior_shape : float
        Shape :math:`a` of the gamma prior on a day's expected final count.

    Returns
    -------
    WindowNowcast

    Notes
    -----
    Day :math:`i`, known at delay :math:`\\delta_i` with count :math:`C_i` and share
    :math:`q_i = q_{\\delta_i}`, is nowcast as :math:`\\hat N_i = C_i / q_i` (chain ladder).
    Given :math:`q`, its unreported part is :math:`U_i \\mid C_i \\sim \\text{NegBin}(C_i + a,
    q_i)` (Poisson thinning with a gamma prior), with mean :math:`m_i = (C_i + a)(1 - q_i)/q_i`
    and variance :math:`(C_i + a)(1 - q_i)/q_i^2`. The delay estimate adds, by the delta
    method with :math:`g_i = \\partial m_i / \\partial \\log q_i = -(C_i + a)/q_i` and
    :math:`\\operatorname{Cov}(\\log\\hat q_{\\delta}, \\log\\hat q_{\\delta'}) =
    \\operatorname{Var}\\log\\hat q_{\\max(\\delta, \\delta')}` (:func:`delay_model`),

    .. math:: \\operatorname{Var}_{\\text{delay}} \\sum_i m_i = \\sum_{i, j} g_i g_j
              \\operatorname{Var}\\log\\hat q_{\\max(\\delta_i, \\delta_j)}

    over the window. The unreported part of the window, :math:`U = \\sum_i U_i`, is taken as
    negative binomial with the summed mean and the summed variance (moment matching), and the
    interval is the reported window count plus its quantiles.

    References
    ----------
    Mack T (1993). ASTIN Bull 23:213-225.
    Höhle M, an der Heiden M (2014). Biometrics 70:993-1002.
    """
    x = np.asarray(values, dtype=np.float64)
    if x.ndim != 2:
        raise ValueError(f"values: expected shape (regions, days), got {x.shape}")
    window = check_window("window", window)
    level = check_level("level", level)
    if not 0 < threshold < 1:
        raise ValueError(f"threshold: must be in (0, 1), got {threshold!r}")
    reported = model.reported[:, 0, :]
    log_var = model.log_var[:, 0, :]
    if reported.shape[0] != x.shape[0]:
        raise ValueError(f"model: {reported.shape[0]} regions, values have {x.shape[0]}")
    width = reported.shape[1]
    delay = np.broadcast_to(np.asarray(known_delay, dtype=np.int64), x.shape)
    # days known at the last delay are complete: only the windows from the first day known
    # earlier need the nowcast (in the daily evaluation, the last ``delays`` days)
    young = np.flatnonzero((delay < width - 1).any(axis=0))
    first = max(int(young[0]) - window + 1, 0) if young.size else x.shape[1]
    if first > 0:
        return _joined(x, first, nowcast_window(
            x[:, first:], delay[:, first:], model, window=window, level=level,
            threshold=threshold, prior_shape=prior_shape), window)
    index = np.clip(delay, 0, width - 1)
    q = np.take_along_axis(reported, index, axis=1)
    lv = np.take_along_axis(log_var, index, axis=1)
    finite = np.isfinite(x)
    incomplete = finite & (1.0 - q >= threshold)
    usable = incomplete & (q > 0)
    qs = np.where(usable, q, 1.0)
    base = np.where(finite, x, 0.0) + prior_shape
    daily = np.where(usable, x / qs, np.where(incomplete, np.nan, x))
    mean = np.where(usable, base * (1.0 - qs) / qs, 0.0)
    nb_var = np.where(usable, base * (1.0 - qs) / qs**2, 0.0)
    g = np.where(usable, base / qs, 0.0)
    lv = np.where(usable, lv, 0.0)
    known = _trailing(x, window)
    estimate = _trailing(daily, window)
    count = _trailing(incomplete.astype(np.float64), window)
    lower, upper = known.copy(), known.copy()
    # only windows from the first incomplete day on need the predictive part: work on the
    # columns they cover (the daily evaluation's incomplete days are its last few)
    any_open = np.flatnonzero(usable.any(axis=0))
    j0 = int(any_open[0]) if any_open.size else x.shape[1]
    s0 = max(j0 - window + 1, 0)
    g, lv, mean, nb_var = g[:, s0:], lv[:, s0:], mean[:, s0:], nb_var[:, s0:]
    # delay variance of the window sums: sum_m lv_{t-m} g_{t-m} (g_{t-m} + 2 sum_{b<m} g_{t-b})
    n_days = g.shape[1]
    delay_var = np.zeros_like(g)
    inner = np.zeros_like(g)
    for m in range(min(window, n_days)):
        gm = np.zeros_like(g)
        gm[:, m:] = g[:, : n_days - m]
        lm = np.zeros_like(g)
        lm[:, m:] = lv[:, : n_days - m]
        delay_var += lm * gm * (gm + 2.0 * inner)
        inner += gm
    mu = np.zeros_like(x)
    var = np.zeros_like(x)
    mu[:, s0:] = _trailing(mean, window)
    var[:, s0:] = _trailing(nb_var, window) + delay_var
    open_ = np.isfinite(estimate) & np.isfinite(mu) & (mu > 0)
    open_[:, :j0] = False
    if open_.any():
        m_o, v_o = mu[open_], np.maximum(var[open_], mu[open_] * (1 + 1e-9))
        size, p = m_o**2 / (v_o - m_o), m_o / v_o
        alpha = 1.0 - level
        lower[open_] += stats.nbinom.ppf(alpha / 2, size, p)
        upper[open_] += stats.nbinom.ppf(1 - alpha / 2, size, p)
    lower = np.fmin(lower, estimate)
    upper = np.fmax(upper, estimate)
    bad = ~np.isfinite(estimate)
    lower[bad] = np.nan
    upper[bad] = np.nan
    return WindowNowcast(
        daily=daily, estimate=estimate, lower=lower, upper=upper, known=known,
        incomplete=incomplete, nowcast=np.isfinite(count) & (count > 0),
        days=np.where(np.isfinite(count), count, 0.0), level=level,
    )


def _joined(x: FloatArray, first: int, tail: WindowNowcast, window: int) -> WindowNowcast:
    """The nowcast of all days from the nowcast of the days from ``first`` on (the earlier
    ones complete: their windows are plain trailing sums)."""
    daily = x.copy()
    daily[:, first:] = tail.daily
    known = _trailing(x, window)
    estimate = _trailing(daily, window)
    lower, upper = known.copy(), known.copy()
    valid = first + window - 1  # the tail's own first window - 1 columns are cut short
    lower[:, valid:] = tail.lower[:, window - 1:]
    upper[:, valid:] = tail.upper[:, window - 1:]
    incomplete = np.zeros(x.shape, dtype=bool)
    incomplete[:, first:] = tail.incomplete
    flag = np.zeros(x.shape, dtype=bool)
    flag[:, valid:] = tail.nowcast[:, window - 1:]
    days = np.zeros(x.shape)
    days[:, valid:] = tail.days[:, window - 1:]
    bad = ~np.isfinite(estimate)
    lower[bad] = np.nan
    upper[bad] = np.nan
    return WindowNowcast(daily=daily, estimate=estimate, lower=lower, upper=upper, known=known,
                         incomplete=incomplete, nowcast=flag, days=days, level=tail.level)


# -- accuracy, measured as known -------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class NowcastAccuracy:
    """How close past nowcasts came to the count known later, per region.

    ``error``/``unadjusted_error``: median absolute relative error of the nowcast and of the
    count reported that morning; ``coverage``: share of mornings whose later count lay inside
    the predictive interval; ``mornings``: how many mornings were scored (NaN figures at 0).
    """

    error: FloatArray
    unadjusted_error: FloatArray
    coverage: FloatArray
    mornings: NDArray[np.int64]


def nowcast_accuracy(
    estimate: ArrayLike, lower: ArrayLike, upper: ArrayLike, reported: ArrayLike,
    later: ArrayLike, scored: ArrayLike,
) -> NowcastAccuracy:
    """Score nowcasts made on past mornings against the count known weeks later.

    All arguments are shaped (regions, mornings); ``scored`` marks the mornings to score
    (a nowcast was made and the later count is known). Mornings whose later count is 0 count
    for coverage but not for the relative errors.

    Notes
    -----
    Relative error :math:`|\\hat N - N| / N` with :math:`N` the count known later; the
    median over mornings; coverage = share of mornings with :math:`L \\le N \\le U`.
    Evaluating each morning's nowcast against later data is the usual check (McGough et al.
    2020, PLoS Comput Biol 16:e1007735).
    """
    est, lo, hi, rep, truth = (np.asarray(a, dtype=np.float64)
                               for a in (estimate, lower, upper, reported, later))
    ok = np.asarray(scored, dtype=bool) & np.isfinite(est) & np.isfinite(truth)
    rel_ok = ok & (truth > 0)
    safe = np.where(truth > 0, truth, 1.0)
    with np.errstate(all="ignore"):
        err = np.where(rel_ok, np.abs(est - truth) / safe, np.nan)
        raw = np.where(rel_ok, np.abs(rep - truth) / safe, np.nan)
        inside = np.where(ok, (lo <= truth) & (truth <= hi), np.nan)
    n = ok.sum(axis=1)
    any_rel = rel_ok.any(axis=1)
    with np.errstate(all="ignore"):
        med = np.full(est.shape[0], np.nan)
        med_raw = np.full(est.shape[0], np.nan)
        if any_rel.any():
            med[any_rel] = np.nanmedian(err[any_rel], axis=1)
            med_raw[any_rel] = np.nanmedian(raw[any_rel], axis=1)
        cover = np.where(n > 0, np.nansum(inside, axis=1) / np.maximum(n, 1), np.nan)
    return NowcastAccuracy(error=med, unadjusted_error=med_raw, coverage=cover,
                           mornings=n.astype(np.int64))
