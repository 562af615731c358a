"""Wastewater indicators: normalisation, smoothing over sample dates, trend, level, catchments.

Inputs are arrays shaped ``(plants, days)`` with NaN on days without a sample. Samples arrive on
irregular dates (two to five a week), so every method here works on the actual sample days rather
than on a filled daily series. District values come from plant values through a catchment matrix.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from server.indicators._arrays import (
    FloatArray,
    IntArray,
    as_population,
    as_regions_days,
    check_level,
    check_window,
    row_chunks,
)

NORMALISATIONS = ("flow", "marker", "none")
_SMOOTH_CHUNK = 16_384  # (plant, day) cells per block of the smoother
_FAR = 1e9  # sentinel sample day beyond either end: its tricube weight is 0


@dataclass(frozen=True, eq=False)
class NormalisedWastewater:
    """Normalised wastewater values per plant and day (NaN on days without a sample).

    ``value`` is the normalised quantity, ``log_value`` its natural logarithm (NaN where the value
    is not positive), ``method`` the normalisation used for each plant.
    """

    value: FloatArray
    log_value: FloatArray
    method: tuple[str, ...]


@dataclass(frozen=True, eq=False)
class SmoothedWastewater:
    """Local linear (LOWESS, one pass) smooth of log values evaluated on every day.

    ``estimate`` is shaped (plants, days), NaN outside the span of a plant's samples unless
    extrapolation was asked for; ``neighbours`` is the number of samples in each local fit.
    """

    estimate: FloatArray
    neighbours: FloatArray


@dataclass(frozen=True, eq=False)
class WastewaterTrend:
    """Log-linear trend over the samples of a trailing window ending on each day.

    ``estimate``/``lower``/``upper`` are the percent change per day, ``window_change`` and its
    bounds the percent change over ``window`` days, ``slope`` and its bounds the slope of the
    natural log per day, ``samples`` the number of samples in each window.
    """

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    slope: FloatArray
    slope_lower: FloatArray
    slope_upper: FloatArray
    window_change: FloatArray
    window_change_lower: FloatArray
    window_change_upper: FloatArray
    samples: FloatArray
    window: int
    level: float


@dataclass(frozen=True, eq=False)
class WastewaterLevel:
    """Level in standard deviations above a plant's own baseline.

    ``estimate`` = (current - baseline) / sd, ``baseline`` the chosen quantile of the log values in
    the trailing baseline period, ``sd`` their standard deviation, ``samples`` how many samples the
    baseline period held on each day.
    """

    estimate: FloatArray
    baseline: FloatArray
    sd: FloatArray
    samples: FloatArray
    baseline_days: int
    quantile: float


def normalise(
    concentration: ArrayLike,
    methods: Sequence[str],
    *,
    flow: ArrayLike | None = None,
    population_served: ArrayLike | None = None,
    marker: ArrayLike | None = None,
) -> NormalisedWastewater:
    """Normalise concentrations per plant and take natural logs.

    Parameters
    ----------
    concentration : array_like, shape (plants, days)
        Measured concentration (e.g. gene copies per litre), NaN on days without a sample.
    methods : sequence of str, one per plant
        ``"flow"``: concentration x flow / population served (load per person per day);
        ``"marker"``: concentration / faecal-marker concentration; ``"none"``: unchanged.
    flow : array_like, shape (plants, days), optional
        24-hour flow (litres per day), needed by ``"flow"`` plants.
    population_served : array_like, shape (plants,), optional
        People connected to each plant, needed by ``"flow"`` plants.
    marker : array_like, shape (plants, days), optional
        Faecal-marker concentration in the same sample, needed by ``"marker"`` plants.

    Returns
    -------
    NormalisedWastewater

    Notes
    -----
    Flow: :math:`v = c Q / N`. Marker: :math:`v = c / m`. Log: :math:`y = \\ln v`, NaN when
    :math:`v \\le 0` (a non-detect needs a substitution rule upstream, not a zero here).

    References
    ----------
    Commission Recommendation (EU) 2021/472 on a common approach to wastewater surveillance
    (normalise by 24-hour flow and population).
    """
    conc = as_regions_days("concentration", concentration)
    plants = conc.shape[0]
    method = _check_methods(methods, plants)
    value = conc.copy()
    if "flow" in method:
        if flow is None or population_served is None:
            raise ValueError("flow: 'flow' plants need both flow and population_served")
        q = _same_shape("flow", flow, conc.shape)
        pop = as_population("population_served", population_served, plants)
        rows = np.array([m == "flow" for m in method])
        value[rows] = conc[rows] * q[rows] / pop[rows]
    if "marker" in method:
        if marker is None:
            raise ValueError("marker: 'marker' plants need the marker concentration")
        m = _same_shape("marker", marker, conc.shape)
        rows = np.array([x == "marker" for x in method])
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.divide(conc[rows], m[rows])
        ratio[~np.isfinite(ratio)] = np.nan
        value[rows] = ratio
    log_value = np.full_like(value, np.nan)
    np.log(value, out=log_value, where=value > 0)
    return NormalisedWastewater(value=value, log_value=log_value, method=method)


def smooth(
    log_values: ArrayLike,
    *,
    neighbours: int | None = None,
    frac: float | None = None,
    extrapolate: bool = False,
) -> SmoothedWastewater:
    """Tricube-weighted local linear regression over the sample days, evaluated on every day.

    Parameters
    ----------
    log_values : array_like, shape (plants, days)
        Log values on sample days, NaN elsewhere.
    neighbours : int, optional
        Number of nearest samples in each local fit (at least 2).
    frac : float, optional
        Alternatively, the share of each plant's samples in each local fit, as in LOWESS:
        ``k = int(frac * n)`` clipped to ``[2, n]``. Give exactly one of ``neighbours``/``frac``.
    extrapolate : bool
        Evaluate the local line before the first and after the last sample too (default: NaN).

    Returns
    -------
    SmoothedWastewater

    Notes
    -----
    For day :math:`t` let :math:`h` be the distance to the k-th nearest sample day and
    :math:`w_j = (1 - (|x_j - t| / h)^3)^3` for :math:`|x_j - t| < h`, normalised to sum to one.
    With :math:`\\bar x = \\sum w_j x_j` and :math:`S = \\sum w_j (x_j - \\bar x)^2`:

    .. math:: \\hat y(t) = \\sum_j w_j y_j \\left(1 + (t - \\bar x)(x_j - \\bar x) / S\\right)

    This is one pass of LOWESS with degree 1 and no robustness iterations. Fewer than two
    positive weights give NaN. The work is vectorised over plants and chunked over days; each
    day looks only at the :math:`2k` samples around it, so the cost is O(plants x days x k).

    References
    ----------
    Cleveland WS (1979). Robust locally weighted regression and smoothing scatterplots.
    J Am Stat Assoc 74:829-836.
    """
    y = as_regions_days("log_values", log_values)
    plants, days = y.shape
    observed = np.isfinite(y)
    n = observed.sum(axis=1)
    if (neighbours is None) == (frac is None):
        raise ValueError(f"neighbours/frac: give exactly one, got {neighbours!r} and {frac!r}")
    if neighbours is not None:
        k = np.full(plants, check_window("neighbours", neighbours, minimum=2))
    else:
        if frac is None or not 0.0 < float(frac) <= 1.0:
            raise ValueError(f"frac: must be in (0, 1], got {frac!r}")
        k = np.clip((float(frac) * n + 1e-10).astype(int), 2, None)
    k = np.minimum(k, n)
    estimate = np.empty((plants, days))
    kmax = int(max(k.max(initial=2), 2))
    for rows in row_chunks(plants, days, _SMOOTH_CHUNK):
        estimate[rows] = _smooth_rows(y[rows], observed[rows], n[rows], k[rows], kmax)
    x = np.arange(days, dtype=np.float64)
    if not extrapolate:
        first = np.where(n > 0, np.argmax(observed, axis=1), days)
        last = np.where(n > 0, days - 1 - np.argmax(observed[:, ::-1], axis=1), -1)
        inside = (x >= first[:, np.newaxis]) & (x <= last[:, np.newaxis])
        estimate[~inside] = np.nan
    return SmoothedWastewater(
        estimate=estimate, neighbours=np.broadcast_to(k.astype(float)[:, None], y.shape).copy()
    )


def _smooth_rows(
    y: FloatArray, observed: NDArray[np.bool_], n: IntArray, k: IntArray, kmax: int
) -> FloatArray:
    """The local linear fits of :func:`smooth` on every day for a block of plants.

    The samples of each plant in day order, padded with far-away sentinels on both sides; day
    t's k nearest samples are a run of k consecutive samples starting at one of the k + 1
    samples before its insertion point j, so the radius (the k-th smallest distance) is the
    smallest over those runs of the larger distance to a run's two ends. The weights are then
    taken from the 2 kmax samples around j, each gathered once as a (plants, days) array.
    Sums use the unnormalised weights and divide once.
    """
    plants, days = y.shape
    x = np.arange(days, dtype=np.float64)
    order = np.argsort(~observed, axis=1, kind="stable")
    real = np.arange(days)[np.newaxis, :] < n[:, np.newaxis]
    width = days + 2 * kmax
    sample_x = np.full((plants, width), _FAR)
    sample_x[:, :kmax] = -_FAR
    sample_x[:, kmax : kmax + days] = np.where(real, order, _FAR)
    sample_y = np.zeros((plants, width))
    sample_y[:, kmax : kmax + days] = np.where(real, np.take_along_axis(y, order, axis=1), 0.0)
    flat_x, flat_y = sample_x.ravel(), sample_y.ravel()
    # padded position of sample j - kmax, as a flat index
    base = np.cumsum(observed, axis=1) - observed + (np.arange(plants) * width)[:, np.newaxis]
    xs = [flat_x[base + c] for c in range(2 * kmax)]
    uniform = bool(np.all(k == kmax))
    radius = np.full((plants, days), np.inf)
    k_col = k[:, np.newaxis]
    for offset in range(kmax + 1):  # the run of k samples starting at j - k + offset
        if uniform:
            first, last = xs[offset], xs[offset + kmax - 1]
        else:
            first = flat_x[base + (kmax - k_col + offset)]
            last = flat_x[base + (kmax - 1 + offset)]
        reach = np.maximum(np.abs(first - x), np.abs(last - x))
        if not uniform:
            reach = np.where(offset <= k_col, reach, np.inf)
        np.minimum(radius, reach, out=radius)
    count = np.zeros((plants, days))
    total = np.zeros((plants, days))
    sum_x = np.zeros((plants, days))
    sum_y = np.zeros((plants, days))
    ys, ws = [], []
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        inv_radius = 1.0 / radius
        for c, xc in enumerate(xs):
            yc = flat_y[base + c]
            u = np.abs(xc - x) * inv_radius
            w = np.maximum(1.0 - u**3, 0.0) ** 3
            count += w > 1e-12
            total += w
            sum_x += w * xc
            sum_y += w * yc
            ys.append(yc)
            ws.append(w)
        xbar = sum_x / total
        spread = np.zeros((plants, days))
        cov = np.zeros((plants, days))
        for w, xc, yc in zip(ws, xs, ys, strict=True):
            wdx = w * (xc - xbar)
            spread += wdx * (xc - xbar)
            cov += wdx * yc
        spread = np.maximum(spread / total, 1e-12)
        fit = sum_y / total + (x - xbar) * (cov / total) / spread
    ok = (count >= 2) & (k_col >= 2)
    return np.where(ok, fit, np.nan)


def trend(
    log_values: ArrayLike, *, window: int = 15, level: float = 0.95, min_samples: int = 3
) -> WastewaterTrend:
    """Slope of a log-linear regression over the samples in the trailing window, with t-interval.

    Parameters
    ----------
    log_values : array_like, shape (plants, days)
        Natural-log values on sample days, NaN elsewhere.
    window : int
        Days in the trailing window ending on (and including) each day; default 15.
    level : float
        Confidence level of the interval.
    min_samples : int
        Fewer samples in the window give NaN (at least 3, to leave one residual degree of freedom).

    Returns
    -------
    WastewaterTrend

    Notes
    -----
    Over the :math:`n` samples :math:`(x_j, y_j)` in the window, ordinary least squares gives
    :math:`b = S_{xy}/S_{xx}`, :math:`s^2 = \\sum_j (y_j - \\bar y - b (x_j - \\bar x))^2/(n-2)`,
    :math:`\\mathrm{se}(b) = s/\\sqrt{S_{xx}}` and the interval
    :math:`b \\pm t_{n-2,(1+\\text{level})/2}\\,\\mathrm{se}(b)`. Percent change per day is
    :math:`100(e^{b}-1)` and over the window :math:`100(e^{b\\,\\text{window}}-1)`; both are
    monotone in :math:`b`, so the slope's bounds map to their bounds.

    References
    ----------
    Percent change from the slope of a log-linear regression over the last 15 days is the trend
    measure of widely used wastewater surveillance dashboards (see REFERENCES.md, Wastewater).
    """
    y = as_regions_days("log_values", log_values)
    window = check_window("window", window, minimum=2)
    level = check_level("level", level)
    min_samples = check_window("min_samples", min_samples, minimum=3)
    plants, days = y.shape
    names = (
        "samples", "slope", "slope_lower", "slope_upper", "estimate", "lower", "upper",
        "window_change", "window_change_lower", "window_change_upper",
    )
    out = {name: np.empty((plants, days)) for name in names}
    # Student t quantiles for the few possible degrees of freedom, looked up per window
    t_table = stats.t.ppf(0.5 + level / 2.0, np.arange(1, max(window - 1, 1) + 1))
    for rows in row_chunks(plants, (days + window) * 4):
        n, slope, lo, hi = _trend_rows(y[rows], window, min_samples, t_table)
        values = [n, slope, lo, hi]
        for scale in (1.0, float(window)):  # percent per day, then over the window
            values += [100.0 * np.expm1(b * scale) for b in (slope, lo, hi)]
        for name, value in zip(names, values, strict=True):
            out[name][rows] = value
    return WastewaterTrend(**out, window=window, level=level)


def _trend_rows(
    y: FloatArray, window: int, min_samples: int, t_table: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Samples, slope and its bounds of :func:`trend` for a few rows.

    The window ending on day t holds days t - window + 1 .. t; each of its ``window`` positions
    is a shifted view of the NaN-padded rows, so every sum is ``window`` additions of whole
    rows (no (rows, days, window) temporaries). Means first, then centred sums of squares and
    the residuals about the fitted line, as a two-pass computation.
    """
    rows, days = y.shape
    padded = np.concatenate([np.full((rows, window - 1), np.nan), y], axis=1)
    observed = np.isfinite(padded)
    values = np.where(observed, padded, 0.0)
    weight = observed.astype(np.float64)
    cols = [values[:, i : i + days] for i in range(window)]
    seen = [weight[:, i : i + days] for i in range(window)]
    n = np.zeros((rows, days))
    sum_x = np.zeros((rows, days))
    sum_y = np.zeros((rows, days))
    for i, (c, o) in enumerate(zip(cols, seen, strict=True)):
        n += o
        if i:
            sum_x += i * o
        sum_y += c
    with np.errstate(invalid="ignore", divide="ignore"):
        xbar = np.divide(sum_x, n, out=np.zeros_like(n), where=n > 0)
        ybar = np.divide(sum_y, n, out=np.zeros_like(n), where=n > 0)
        sxx = np.zeros((rows, days))
        sxy = np.zeros((rows, days))
        dxs, dys = [], []
        for i, (c, o) in enumerate(zip(cols, seen, strict=True)):
            dx = (i - xbar) * o  # 0 on days without a sample
            dy = (c - ybar) * o
            sxx += dx * dx
            sxy += dx * dy
            dxs.append(dx)
            dys.append(dy)
        valid = (n >= min_samples) & (sxx > 0)
        slope = np.divide(sxy, sxx, out=np.full_like(n, np.nan), where=valid)
        b = np.where(valid, slope, 0.0)
        resid = np.zeros((rows, days))
        for dx, dy in zip(dxs, dys, strict=True):
            e = dy - b * dx
            resid += e * e
        dof = np.maximum(n - 2.0, 1.0)
        se = np.sqrt(np.divide(resid / dof, sxx, out=np.full_like(n, np.nan), where=valid))
    tq = t_table[dof.astype(np.intp) - 1]
    lo = np.where(valid, slope - tq * se, np.nan)
    hi = np.where(valid, slope + tq * se, np.nan)
    return n, slope, lo, hi


def level(
    log_values: ArrayLike,
    *,
    current: ArrayLike | None = None,
    baseline_days: int = 365,
    quantile: float = 0.10,
    min_samples: int = 10,
) -> WastewaterLevel:
    """Level of each day's value in standard deviations above the plant's own baseline.

    Parameters
    ----------
    log_values : array_like, shape (plants, days)
        Natural-log values on sample days, NaN elsewhere; the history the baseline is taken from.
    current : array_like, shape (plants, days), optional
        The values to express as a level (e.g. the smooth); default ``log_values`` itself.
    baseline_days : int
        Length of the trailing baseline period ending on each day (default 365, twelve months).
    quantile : float
        Quantile of the baseline period taken as the baseline (default 0.10).
    min_samples : int
        Fewer samples in the baseline period give NaN.

    Returns
    -------
    WastewaterLevel

    Notes
    -----
    With :math:`Y_t` the log values in days :math:`(t - \\text{baseline\\_days}, t]`:
    :math:`b_t = Q_q(Y_t)`, :math:`s_t = \\mathrm{sd}(Y_t)` (ddof 1) and
    :math:`\\text{level}_t = (c_t - b_t)/s_t`. The baseline is recomputed every day from the
    trailing period. With :math:`n` samples and :math:`h = q (n - 1)` the quantile is
    :math:`x_{(\\lfloor h \\rfloor)} + (h - \\lfloor h \\rfloor)(x_{(\\lfloor h \\rfloor + 1)} -
    x_{(\\lfloor h \\rfloor)})` (order statistics from 0). The
    values are kept ordered as the window slides (pandas' rolling quantile), so the cost is
    O(days log window) per plant.

    References
    ----------
    Baseline = 10th percentile of the log values over the last 12 months, level in standard
    deviations above it: a widely used wastewater level method (see REFERENCES.md, Wastewater).
    Hyndman RJ, Fan Y (1996). Sample quantiles in statistical packages. Am Stat 50:361-365
    (definition 7, numpy's default ``linear`` method).
    """
    y = as_regions_days("log_values", log_values)
    cur = y if current is None else _same_shape("current", current, y.shape)
    baseline_days = check_window("baseline_days", baseline_days, minimum=2)
    min_samples = check_window("min_samples", min_samples, minimum=2)
    if not 0.0 <= float(quantile) <= 1.0:
        raise ValueError(f"quantile: must be in [0, 1], got {quantile!r}")
    plants, days = y.shape
    # the quantile from pandas' rolling quantile (an ordered skip list updated as the window
    # slides; linear interpolation at q (n - 1), the definition of numpy.quantile)
    roll = pd.DataFrame(y.T).rolling(baseline_days, min_periods=1)
    quant = roll.quantile(float(quantile), interpolation="linear").to_numpy().T
    names = ("estimate", "baseline", "sd", "samples")
    out = {name: np.empty((plants, days)) for name in names}
    for rows in row_chunks(plants, days):  # the rest in blocks of plants that stay in cache
        part = _level_rows(y[rows], cur[rows], quant[rows], baseline_days, min_samples)
        for name, values in zip(names, part, strict=True):
            out[name][rows] = values
    estimate, baseline, sd, samples = (out[name] for name in names)
    return WastewaterLevel(
        estimate=estimate,
        baseline=baseline,
        sd=sd,
        samples=samples,
        baseline_days=baseline_days,
        quantile=float(quantile),
    )


def to_districts(plant_values: ArrayLike, served: ArrayLike) -> FloatArray:
    """Population-weighted district values from plant values through the catchment table.

    Parameters
    ----------
    plant_values : array_like, shape (plants, days)
        Any per-plant daily value (best a normalised load in linear units), NaN where missing.
    served : array_like, shape (districts, plants)
        People of each district served by each plant (share of the district x its population).

    Returns
    -------
    ndarray, shape (districts, days)
        NaN where none of the district's served population has a value that day.

    Notes
    -----
    :math:`v_{d,t} = \\sum_p w_{dp} v_{p,t} / \\sum_p w_{dp}`, both sums over the plants with a
    value on day :math:`t`.
    """
    v = as_regions_days("plant_values", plant_values)
    w = np.asarray(served, dtype=np.float64)
    if w.ndim != 2 or w.shape[1] != v.shape[0]:
        raise ValueError(f"served: expected shape (districts, {v.shape[0]}), got {w.shape}")
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        raise ValueError("served: populations served must be finite and non-negative")
    has = np.isfinite(v)
    num = w @ np.where(has, v, 0.0)
    den = w @ has.astype(np.float64)
    return np.divide(num, den, out=np.full_like(num, np.nan), where=den > 0)


def catchment_matrix(
    table: pd.DataFrame, *, plants: Sequence[str], districts: Sequence[str]
) -> FloatArray:
    """Build the (districts, plants) matrix of people served from a long catchment table.

    Parameters
    ----------
    table : DataFrame
        One row per (plant, district) link with columns ``plant``, ``district`` and either
        ``served`` (people of the district connected to the plant) or ``share`` and
        ``population`` (share of the district's population served, and that population).
    plants, districts : sequence of str
        Row and column order of the result; codes in the table must appear here.

    Returns
    -------
    ndarray, shape (districts, plants)
        Zero where a district is not served by a plant; duplicate links are summed.

    Notes
    -----
    :math:`w_{dp} = \\text{share}_{dp} \\cdot N_d` (or the given ``served``).
    """
    if "served" in table.columns:
        served = table["served"].to_numpy(np.float64)
    elif {"share", "population"} <= set(table.columns):
        share = table["share"].to_numpy(np.float64)
        if np.any((share < 0) | (share > 1)):
            bad = share[(share < 0) | (share > 1)][0]
            raise ValueError(f"table: share must be within [0, 1], got {bad!r}")
        served = share * table["population"].to_numpy(np.float64)
    else:
        raise ValueError("table: needs a 'served' column or 'share' and 'population' columns")
    p = pd.Index(list(plants)).get_indexer(table["plant"])
    d = pd.Index(list(districts)).get_indexer(table["district"])
    if (p < 0).any():
        raise ValueError(f"table: unknown plant {table['plant'].to_numpy()[p < 0][0]!r}")
    if (d < 0).any():
        raise ValueError(f"table: unknown district {table['district'].to_numpy()[d < 0][0]!r}")
    out = np.zeros((len(districts), len(plants)))
    np.add.at(out, (d, p), served)
    return out


def _level_rows(
    y: FloatArray, cur: FloatArray, quant: FloatArray, window: int, min_samples: int
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Level, baseline, sd and sample count of :func:`level` for a block of plants.

    The sd (ddof 1) comes from cumulative sums of the values centred on each row's mean, and is
    exactly 0 where the window's values are all equal.
    """
    plants, days = y.shape
    observed = np.isfinite(y)
    counts = np.cumsum(observed, axis=1)
    shifted = np.concatenate([np.zeros((plants, window)), counts], axis=1)
    n = (counts - shifted[:, :days]).astype(np.float64)
    enough = n >= min_samples
    row_n = observed.sum(axis=1)
    centre = np.where(observed, y, 0.0).sum(axis=1) / np.maximum(row_n, 1)
    dev = np.where(observed, y - centre[:, None], 0.0)
    s1 = _trailing(dev, window)
    s2 = _trailing(dev * dev, window)
    with np.errstate(divide="ignore", invalid="ignore"):
        var = np.maximum((s2 - s1 * s1 / n) / (n - 1), 0.0)
    var = np.where(_all_equal(y, window), 0.0, var)
    baseline = np.where(enough, quant, np.nan)
    sd = np.where(enough, np.sqrt(var), np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        estimate = np.divide(cur - baseline, sd, out=np.full_like(baseline, np.nan), where=sd > 0)
    return estimate, baseline, sd, n


def _all_equal(y: FloatArray, window: int) -> NDArray[np.bool_]:
    """Whether the finite values of each trailing window (at least one) are all equal.

    The samples of a window are consecutive in sample order, so they are all equal when no
    sample in the window differs from the sample before it, the window's first sample (whose
    predecessor lies outside) excepted: a trailing count of changes minus the change at the
    window's first sample. Exact comparisons, as the window maximum equal to its minimum.
    """
    rows, days = y.shape
    ok = np.isfinite(y)
    day = np.broadcast_to(np.arange(days), y.shape)
    last = np.maximum.accumulate(np.where(ok, day, -1), axis=1)  # last sample day <= d
    before = np.full((rows, days), -1)
    before[:, 1:] = last[:, :-1]
    previous = np.take_along_axis(y, np.maximum(before, 0), axis=1)
    change = ok & (before >= 0) & (y != previous)
    # first sample day >= d (days when there is none)
    nxt = np.minimum.accumulate(np.where(ok, day, days)[:, ::-1], axis=1)[:, ::-1]
    start = np.maximum(np.arange(days) - window + 1, 0)
    first = nxt[:, start]
    has = first < days
    change_at_first = np.take_along_axis(change, np.minimum(first, days - 1), axis=1) & has
    changes = _trailing(change.astype(np.float64), window) - change_at_first
    return has & (first <= np.arange(days)) & (changes == 0)


def _trailing(values: FloatArray, window: int) -> FloatArray:
    """Sum over the trailing ``window`` days (cumulative sums along axis 1)."""
    total = np.cumsum(values, axis=1)
    if window < values.shape[1]:
        total[:, window:] -= total[:, :-window].copy()
    return total


def _check_methods(methods: Sequence[str], plants: int) -> tuple[str, ...]:
    method = (methods,) * plants if isinstance(methods, str) else tuple(methods)
    if len(method) != plants:
        raise ValueError(f"methods: {len(method)} methods for {plants} plants")
    for m in method:
        if m not in NORMALISATIONS:
            raise ValueError(
                f"methods: unknown normalisation {m!r}, expected one of {NORMALISATIONS}"
            )
    return method


def _same_shape(name: str, values: ArrayLike, shape: tuple[int, ...]) -> FloatArray:
    arr = as_regions_days(name, values)
    if arr.shape != shape:
        raise ValueError(f"{name}: expected shape {shape}, got {arr.shape}")
    return arr
