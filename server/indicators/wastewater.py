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
from numpy.typing import ArrayLike
from scipy import stats

from server.indicators._arrays import (
    FloatArray,
    as_population,
    as_regions_days,
    check_level,
    check_window,
)

NORMALISATIONS = ("flow", "marker", "none")
_CHUNK_ELEMENTS = 4_000_000


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
    estimate = np.full((plants, days), np.nan)
    x = np.arange(days, dtype=np.float64)
    # samples of each plant in day order, padded; the k nearest samples of day t lie among the
    # 2k samples around its insertion point j (a run of k containing sample j-1 or j)
    order = np.argsort(~observed, axis=1, kind="stable")
    rank = np.arange(days)[np.newaxis, :]
    sample_x = np.where(rank < n[:, np.newaxis], order, 0).astype(np.float64)
    sample_y = np.where(rank < n[:, np.newaxis], np.take_along_axis(y, order, axis=1), 0.0)
    before = np.cumsum(observed, axis=1) - observed
    kmax = int(max(k.max(initial=2), 2))
    offsets = np.arange(-kmax, kmax)
    rows = np.arange(plants)[:, np.newaxis, np.newaxis]
    usable = k >= 2
    kk = np.maximum(k, 1) - 1
    chunk = max(1, _CHUNK_ELEMENTS // max(1, plants * 2 * kmax))
    for start in range(0, days, chunk):
        t = x[start : start + chunk]
        idx = before[:, start : start + chunk, np.newaxis] + offsets
        inside = (idx >= 0) & (idx < n[:, np.newaxis, np.newaxis])
        idx = np.clip(idx, 0, days - 1)
        xs = sample_x[rows, idx]
        ys = np.where(inside, sample_y[rows, idx], 0.0)
        dist = np.where(inside, np.abs(xs - t[np.newaxis, :, np.newaxis]), np.inf)
        sorted_part = np.partition(dist, np.unique(kk), axis=-1)
        radius = np.take_along_axis(sorted_part, kk[:, np.newaxis, np.newaxis], axis=-1)
        with np.errstate(divide="ignore", invalid="ignore"):
            u = np.where(radius > 0, dist / radius, np.inf)
        w = np.where(u < 1.0, (1.0 - np.minimum(u, 1.0) ** 3) ** 3, 0.0)
        enough = (w > 1e-12).sum(axis=-1) >= 2
        total = w.sum(axis=-1, keepdims=True)
        w = np.divide(w, total, out=np.zeros_like(w), where=total > 0)
        xs = np.where(inside, xs, 0.0)
        xbar = (w * xs).sum(axis=-1)
        dx = xs - xbar[..., np.newaxis]
        spread = np.maximum((w * dx**2).sum(axis=-1), 1e-12)
        mean_y = (w * ys).sum(axis=-1)
        cov = (w * dx * ys).sum(axis=-1)
        fit = mean_y + (t[np.newaxis, :] - xbar) * cov / spread
        ok = enough & usable[:, np.newaxis]
        estimate[:, start : start + chunk] = np.where(ok, fit, np.nan)
    if not extrapolate:
        first = np.where(n > 0, np.argmax(observed, axis=1), days)
        last = np.where(n > 0, days - 1 - np.argmax(observed[:, ::-1], axis=1), -1)
        inside = (x >= first[:, np.newaxis]) & (x <= last[:, np.newaxis])
        estimate[~inside] = np.nan
    return SmoothedWastewater(
        estimate=estimate, neighbours=np.broadcast_to(k.astype(float)[:, None], y.shape).copy()
    )


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
    padded = np.concatenate([np.full((plants, window - 1), np.nan), y], axis=1)
    view = np.lib.stride_tricks.sliding_window_view(padded, window, axis=1)
    observed = np.isfinite(view)
    n = observed.sum(axis=-1).astype(np.float64)
    xs = np.arange(window, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        xbar = np.divide((observed * xs).sum(axis=-1), n, out=np.zeros_like(n), where=n > 0)
        yv = np.where(observed, view, 0.0)
        ybar = np.divide(yv.sum(axis=-1), n, out=np.zeros_like(n), where=n > 0)
        dx = np.where(observed, xs - xbar[..., np.newaxis], 0.0)
        dy = np.where(observed, yv - ybar[..., np.newaxis], 0.0)
        sxx = (dx * dx).sum(axis=-1)
        sxy = (dx * dy).sum(axis=-1)
        valid = (n >= min_samples) & (sxx > 0)
        slope = np.divide(sxy, sxx, out=np.full_like(n, np.nan), where=valid)
        dof = np.maximum(n - 2.0, 1.0)
        resid = ((dy - np.where(valid, slope, 0.0)[..., np.newaxis] * dx) ** 2).sum(axis=-1)
        se = np.sqrt(np.divide(resid / dof, sxx, out=np.full_like(n, np.nan), where=valid))
    tq = stats.t.ppf(0.5 + level / 2.0, dof)
    lo = np.where(valid, slope - tq * se, np.nan)
    hi = np.where(valid, slope + tq * se, np.nan)

    def pct(b: FloatArray, scale: float) -> FloatArray:
        return 100.0 * np.expm1(b * scale)

    return WastewaterTrend(
        estimate=pct(slope, 1.0),
        lower=pct(lo, 1.0),
        upper=pct(hi, 1.0),
        slope=slope,
        slope_lower=lo,
        slope_upper=hi,
        window_change=pct(slope, window),
        window_change_lower=pct(lo, window),
        window_change_upper=pct(hi, window),
        samples=n,
        window=window,
        level=level,
    )


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
    observed = np.isfinite(y)
    counts = np.cumsum(observed, axis=1)
    shifted = np.concatenate([np.zeros((plants, baseline_days)), counts], axis=1)
    samples = (counts - shifted[:, :days]).astype(np.float64)
    enough = samples >= min_samples
    quant, spread = _trailing_quantile_and_sd(y, baseline_days, float(quantile), samples)
    baseline = np.where(enough, quant, np.nan)
    sd = np.where(enough, spread, np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        estimate = np.divide(cur - baseline, sd, out=np.full_like(baseline, np.nan), where=sd > 0)
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


def _trailing_quantile_and_sd(
    y: FloatArray, window: int, q: float, n: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """Trailing-window quantile (linear method) and sd (ddof 1) of the finite values of each row.

    The quantile comes from pandas' rolling quantile (an ordered skip list updated as the window
    slides, linear interpolation between the order statistics at ``q (n - 1)``: the same
    definition as :func:`numpy.quantile`). The sd comes from cumulative sums of the values
    centred on each row's mean, and is exactly 0 where the window's values are all equal.
    """
    frame = pd.DataFrame(y.T)
    roll = frame.rolling(window, min_periods=1)
    quant = roll.quantile(q, interpolation="linear").to_numpy().T
    flat = (roll.max().to_numpy() == roll.min().to_numpy()).T
    ok = np.isfinite(y)
    counts = ok.sum(axis=1)
    centre = np.where(ok, y, 0.0).sum(axis=1) / np.maximum(counts, 1)
    dev = np.where(ok, y - centre[:, None], 0.0)
    s1 = _trailing(dev, window)
    s2 = _trailing(dev * dev, window)
    with np.errstate(divide="ignore", invalid="ignore"):
        var = np.maximum((s2 - s1 * s1 / n) / (n - 1), 0.0)
    var = np.where(flat, 0.0, var)
    return quant, np.sqrt(var)


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
