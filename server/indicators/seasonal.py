"""Seasonal intensity by the moving epidemic method (MEM), for many regions at once.

Weekly values (ISO 8601 weeks) are cut into surveillance *seasons* (week 40 to week 20 of the next
year by default). For each past season the epidemic period is located on the curve of maximum
accumulated percentages; the highest pre-epidemic values of the past seasons give the *epidemic
threshold* and the highest epidemic values give the *medium*, *high* and *very high* intensity
thresholds. Each week is then placed on the scale below threshold / low / medium / high / very
high, against thresholds built only from seasons that had ended before it; with fewer than
``min_seasons`` usable past seasons its state is :data:`NOT_ENOUGH_SEASONS`.

Pure numpy/scipy, arrays shaped ``(regions, ...)``; missing weeks are NaN, never 0.

References
----------
Vega T, Lozano JE, Meerhoff T, et al. Influenza surveillance in Europe: establishing epidemic
thresholds by the moving epidemic method. Influenza Other Respir Viruses 2013;7(4):546-58.
Vega T, Lozano JE, Meerhoff T, et al. Influenza surveillance in Europe: comparing intensity
levels calculated using the moving epidemic method. Influenza Other Respir Viruses
2015;9(5):234-46.
Lozano JE. mem: the moving epidemic method R package (source read at github lozalojo/mem:
R/memmodel.R, memtiming.R, calcular.map.R, calcular.optimo.criterio.R, iconfianza*.R,
max.n.valores.R, missings.inside.R, suavizado.R).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import NDArray
from scipy.stats import norm

__all__ = [
    "BELOW_THRESHOLD",
    "HIGH",
    "LEVEL_NAMES",
    "LOW",
    "MEDIUM",
    "NOT_ENOUGH_SEASONS",
    "NO_VALUE",
    "VERY_HIGH",
    "EpidemicTiming",
    "MemThresholds",
    "SeasonLayout",
    "SeasonalIntensity",
    "epidemic_timing",
    "fill_inside",
    "map_curve",
    "mem_thresholds",
    "n_values",
    "season_layout",
    "seasonal_intensity",
    "smooth_local_linear",
]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]
Interval = Literal["mean", "point"]

#: States of a week (``SeasonalIntensity.state``); 0..4 are also the engine's level values.
NO_VALUE = -2
NOT_ENOUGH_SEASONS = -1
BELOW_THRESHOLD, LOW, MEDIUM, HIGH, VERY_HIGH = 0, 1, 2, 3, 4
LEVEL_NAMES = ("below threshold", "low", "medium", "high", "very high")

#: Defaults of the mem R package (memmodel.R, seen): slope criterion 2.8 %, last 10 seasons,
#: epidemic threshold at the one-sided 95 % level, intensity at 40 %, 90 % and 97.5 %.
DELTA = 2.8
MAX_SEASONS = 10
THRESHOLD_LEVEL = 0.95
INTENSITY_LEVELS = (0.40, 0.90, 0.975)


def fill_inside(values: FloatArray) -> FloatArray:
    """Fill missing values *inside* each row (last axis) by linear interpolation.

    Leading and trailing missing values stay missing, as ``missings.inside`` in the mem package
    leaves them; the package fills inner gaps with a kernel regression whose bandwidth it selects
    from the data (``fill.missing``), this uses straight lines between the neighbours instead.
    """
    v = np.asarray(values, dtype=np.float64)
    n = v.shape[-1]
    idx = np.arange(n)
    ok = np.isfinite(v)
    prev = np.maximum.accumulate(np.where(ok, idx, -1), axis=-1)
    nxt = np.flip(np.minimum.accumulate(np.flip(np.where(ok, idx, n), axis=-1), axis=-1), axis=-1)
    inside = ~ok & (prev >= 0) & (nxt < n)
    p, q = np.clip(prev, 0, n - 1), np.clip(nxt, 0, n - 1)
    vp, vq = np.take_along_axis(v, p, -1), np.take_along_axis(v, q, -1)
    with np.errstate(invalid="ignore", divide="ignore"):
        interp = vp + (vq - vp) * (idx - p) / np.where(q > p, q - p, 1)
    return np.where(inside, interp, v)


@dataclass(frozen=True, kw_only=True)
class MapCurve:
    """Maximum accumulated percentage curve of each season (last axis: 0..W weeks).

    ``percent[..., s]`` is the largest sum of ``s`` consecutive weeks as a percentage of the
    season's sum; ``start[..., s]`` the first week (0-based) of the earliest such run.
    """

    percent: FloatArray
    start: IntArray


def map_curve(seasons: FloatArray) -> MapCurve:
    """The MAP curve (Vega et al. 2013, Methods; mem ``calcular.map``), missing weeks as 0."""
    x = np.nan_to_num(np.asarray(seasons, dtype=np.float64), nan=0.0)
    w = x.shape[-1]
    csum = np.concatenate([np.zeros(x.shape[:-1] + (1,)), np.cumsum(x, axis=-1)], axis=-1)
    total = csum[..., -1]
    best = np.zeros(x.shape[:-1] + (w + 1,))
    start = np.zeros(x.shape[:-1] + (w + 1,), dtype=np.int64)
    for s in range(1, w + 1):
        sums = csum[..., s:] - csum[..., :-s]  # runs of s weeks starting at 0..w-s
        best[..., s] = sums.max(axis=-1)
        start[..., s] = sums.argmax(axis=-1)  # the first maximum, as min(which(max == sums))
    with np.errstate(invalid="ignore", divide="ignore"):
        percent = 100.0 * best / total[..., None]
    return MapCurve(percent=percent, start=start)


def smooth_local_linear(y: FloatArray, bandwidth: float = 1.0) -> FloatArray:
    """Local linear regression with a normal kernel of sd ``bandwidth`` at the points 0..n-1.

    The mem package smooths the MAP curve this way before taking its slope
    (``suavizado(y, 1)``: ``sm::sm.regression`` with ``h = 1``, local linear by default [from
    memory: sm's default ``poly.index = 1``]); negative estimates become 0 as there.
    """
    n = y.shape[-1]
    t = np.arange(n, dtype=np.float64)
    d = t[None, :] - t[:, None]  # (eval, data)
    k = np.exp(-0.5 * (d / bandwidth) ** 2)
    s1, s2 = (k * d).sum(axis=1), (k * d * d).sum(axis=1)
    weights = k * (s2[:, None] - d * s1[:, None])
    weights /= weights.sum(axis=1, keepdims=True)
    out = np.asarray(y, dtype=np.float64) @ weights.T
    return np.maximum(out, 0.0)


@dataclass(frozen=True, kw_only=True)
class EpidemicTiming:
    """Epidemic period of each season: 0-based first and last week; ``length`` 0 = none."""

    start: IntArray
    end: IntArray
    length: IntArray


def epidemic_timing(seasons: FloatArray, *, delta: float = DELTA, smooth: bool = True
                    ) -> EpidemicTiming:
    """Locate each season's epidemic period by the MAP curve and the slope criterion.

    Notes
    -----
    The epidemic lasts the largest number of weeks ``L`` for which every added week still adds at
    least ``delta`` percentage points to the MAP curve: with ``d_s = P_s - P_{s-1}`` (``P`` the
    MAP curve, smoothed when ``smooth``), ``L = min{s : d_s < delta} - 1``, or all weeks when no
    slope falls under ``delta`` (mem ``calcular.optimo.criterio``, method 2, the package's default
    since Vega et al. 2013 [method choice from the package source, seen]). The period is the
    earliest run of ``L`` weeks with the largest sum. A season with no counts has no epidemic.
    """
    curve = map_curve(seasons)
    p = np.nan_to_num(curve.percent, nan=0.0)
    if smooth:
        p = smooth_local_linear(p)
    slope = np.diff(p, axis=-1)  # slope[..., s-1] = P_s - P_{s-1}, s = 1..W
    w = slope.shape[-1]
    under = slope < delta
    first = np.where(under.any(axis=-1), under.argmax(axis=-1) + 1, w + 1)
    length = (first - 1).astype(np.int64)
    start = np.take_along_axis(curve.start, length[..., None], -1)[..., 0]
    return EpidemicTiming(start=start, end=start + length - 1, length=length)


def n_values(n_seasons: int | NDArray[np.integer], total: int = 30) -> IntArray:
    """Values taken per season: ``max(1, round(30 / seasons))`` (mem ``memmodel``, ``i.n.max =
    -1``); R's ``round`` and numpy's both round halves to even (30/4 = 7.5 -> 8, 30/12 = 2.5 -> 2).
    """
    s = np.asarray(n_seasons, dtype=np.float64)
    with np.errstate(divide="ignore"):
        n = np.round(np.where(s > 0, total / np.maximum(s, 1), 0))
    return np.maximum(1, n).astype(np.int64)


@dataclass(frozen=True, kw_only=True)
class MemThresholds:
    """MEM thresholds per region.

    ``epidemic`` the epidemic threshold; ``intensity`` (regions, 3) medium, high, very high;
    ``seasons`` how many seasons were used; ``n`` values taken per season; ``pre_values`` /
    ``epi_values`` (regions, seasons * n) the pooled values (NaN padding).
    """

    epidemic: FloatArray
    intensity: FloatArray
    seasons: IntArray
    n: IntArray
    pre_values: FloatArray
    epi_values: FloatArray


def _top_n(values: FloatArray, keep: NDArray[np.bool_], n: IntArray) -> FloatArray:
    """The ``n`` (per region) highest of ``values`` (regions, seasons, weeks) where ``keep``."""
    v = np.where(keep & np.isfinite(values), values, -np.inf)
    ordered = -np.sort(-v, axis=-1)  # descending, -inf last
    rank = np.arange(ordered.shape[-1])
    take = (rank[None, None, :] < n[:, None, None]) & np.isfinite(ordered)
    return np.where(take, ordered, np.nan).reshape(values.shape[0], -1)


def _upper(values: FloatArray, z: FloatArray, interval: Interval) -> FloatArray:
    """mean + z * sd / sqrt(m) ("mean": confidence interval of the mean) or mean + z * sd
    ("point") over the last axis, NaN ignored; z broadcasts as (..., levels)."""
    m = np.isfinite(values).sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.nanmean(np.where(m[:, None] > 0, values, 0.0), axis=-1)
        sd = np.sqrt(np.nansum((values - mean[:, None]) ** 2, axis=-1) / (m - 1))
        scale = sd / np.sqrt(m) if interval == "mean" else sd
    mean = np.where(m > 0, mean, np.nan)
    scale = np.where(m > 1, scale, np.nan)
    return mean[:, None] + z * scale[:, None]


def mem_thresholds(
    seasons: FloatArray, *, use: NDArray[np.bool_] | None = None, delta: float = DELTA,
    smooth: bool = True, threshold_level: float = THRESHOLD_LEVEL,
    intensity_levels: tuple[float, float, float] = INTENSITY_LEVELS,
    interval: Interval = "mean", timing: EpidemicTiming | None = None,
) -> MemThresholds:
    """Epidemic and intensity thresholds from past seasons (regions, seasons, weeks).

    Parameters
    ----------
    seasons : array (regions, seasons, weeks)
        Weekly rates, one row per season aligned on its first week; NaN = missing. Missing weeks
        inside a season are filled (:func:`fill_inside`) before anything else.
    use : bool array (regions, seasons), optional
        Seasons to pool (default all with a positive sum).
    interval : "mean" or "point"
        "mean": upper limits of one-sided confidence intervals of the mean, as Vega et al.
        (2013, 2015) publish them; "point": mean + z * sd, the mem package's current defaults
        (``i.type.threshold = 5``, ``i.type.intensity = 6``, seen in its source).

    Notes
    -----
    With ``n = max(1, round(30 / k))`` for ``k`` seasons pooled, the ``n`` highest pre-epidemic
    weekly values of each season (weeks before its epidemic) are pooled into ``x`` and the ``n``
    highest epidemic values into ``y``. A season whose MAP slope is under ``delta`` from its
    first week has no epidemic and gives no values: in mem its optimum is the curve's row 0, so
    ``memtiming`` takes start = end = 0 and ``datos[-(0:n)]`` leaves no pre-epidemic weeks.
    With ``z_a`` the standard normal quantile (one-sided: ``qnorm(1 - (1 - a) / 1)`` in mem):

    - epidemic threshold ``mean(x) + z_0.95 * sd(x) / sqrt(m)`` (``m`` values; "point": without
      the ``sqrt(m)``);
    - intensity thresholds ``exp(mean(log y) + z_a * sd(log y) / sqrt(m))`` for a = 0.40, 0.90,
      0.975 (geometric mean; when a pooled value is 0 the package takes ``log(y + 1)`` and
      subtracts 1 at the end, done here too).
    """
    v = fill_inside(np.asarray(seasons, dtype=np.float64))
    if v.ndim != 3:
        raise ValueError(f"seasons: expected (regions, seasons, weeks), got shape {v.shape}")
    total = np.nansum(v, axis=-1)
    pool = total > 0 if use is None else np.asarray(use, dtype=bool) & (total > 0)
    k = pool.sum(axis=1)
    n = np.where(k > 0, n_values(k), 0)
    t = timing if timing is not None else epidemic_timing(v, delta=delta, smooth=smooth)
    week = np.arange(v.shape[-1])[None, None, :]
    s, e = t.start[..., None], t.end[..., None]
    has = t.length[..., None] > 0
    pre_mask = pool[..., None] & has & (week < s)  # no epidemic: no values, as mem
    epi_mask = pool[..., None] & has & (week >= s) & (week <= e)
    pre = _top_n(v, pre_mask, n)
    epi = _top_n(v, epi_mask, n)
    epidemic = _upper(pre, np.array([norm.ppf(threshold_level)]), interval)[:, 0]
    z = norm.ppf(np.asarray(intensity_levels, dtype=np.float64))[None, :]
    zero = np.nanmin(np.where(np.isfinite(epi), epi, np.inf), axis=-1) <= 0
    shift = np.where(zero, 1.0, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        logs = np.log(epi + shift[:, None])
        intensity = np.exp(_upper(logs, z, interval)) - shift[:, None]
    return MemThresholds(epidemic=epidemic, intensity=intensity, seasons=k.astype(np.int64),
                         n=n.astype(np.int64), pre_values=pre, epi_values=epi)


@dataclass(frozen=True, kw_only=True)
class SeasonLayout:
    """Where each week falls: ``season[t]`` (-1 outside any season), ``position[t]`` (week of
    its season, 0-based), season starts and ends (Monday of the first week, Sunday of the last)."""

    season: IntArray
    position: IntArray
    starts: tuple[dt.date, ...]
    ends: tuple[dt.date, ...]
    length: int


def season_layout(week_starts: NDArray[np.datetime64], *, start_week: int = 40,
                  end_week: int = 20) -> SeasonLayout:
    """Seasons over the ISO weeks beginning on ``week_starts`` (Mondays, ascending).

    A season runs from ISO week ``start_week`` of a year to ``end_week`` of the next year (of the
    same year when ``start_week <= end_week``). Its weeks are counted from its first Monday, so a
    53-week year adds one week at the end of that season's row.
    """
    for name, wk in (("start_week", start_week), ("end_week", end_week)):
        if isinstance(wk, bool) or not isinstance(wk, int) or not 1 <= wk <= 52:
            raise ValueError(f"{name}: expected an ISO week 1..52, got {wk!r}")
    days = np.asarray(week_starts, dtype="datetime64[D]")
    if days.size == 0:
        return SeasonLayout(season=np.zeros(0, np.int64), position=np.zeros(0, np.int64),
                            starts=(), ends=(), length=0)
    first = days[0].astype(dt.date).isocalendar().year
    last = days[-1].astype(dt.date).isocalendar().year
    wrap = start_week > end_week
    starts, ends = [], []
    for year in range(first - 1, last + 1):
        starts.append(dt.date.fromisocalendar(year, start_week, 1))
        ends.append(dt.date.fromisocalendar(year + 1 if wrap else year, end_week, 7))
    s = np.array(starts, dtype="datetime64[D]")
    e = np.array(ends, dtype="datetime64[D]")
    idx = np.searchsorted(s, days, side="right") - 1
    inside = (idx >= 0) & (days <= e[np.maximum(idx, 0)])
    pos = ((days - s[np.maximum(idx, 0)]).astype(np.int64)) // 7
    length = int(((e - s).astype(np.int64).max() + 1) // 7)
    return SeasonLayout(season=np.where(inside, idx, -1), position=np.where(inside, pos, -1),
                        starts=tuple(starts), ends=tuple(ends), length=length)


@dataclass(frozen=True, kw_only=True)
class SeasonalIntensity:
    """Level of each region's week against the MEM thresholds of its past seasons.

    ``state`` (regions, weeks): :data:`NO_VALUE`, :data:`NOT_ENOUGH_SEASONS` or 0..4 (below
    threshold .. very high); ``level`` the same as float with NaN for the first two. Thresholds
    (regions, weeks) are NaN where no baseline exists; ``seasons`` how many seasons built them.
    """

    state: NDArray[np.int8]
    level: FloatArray
    epidemic: FloatArray
    medium: FloatArray
    high: FloatArray
    very_high: FloatArray
    seasons: IntArray


def seasonal_intensity(
    weekly: FloatArray, week_starts: NDArray[np.datetime64], *, start_week: int = 40,
    end_week: int = 20, max_seasons: int = MAX_SEASONS, min_seasons: int = 3,
    min_coverage: float = 0.5, delta: float = DELTA, smooth: bool = True,
    threshold_level: float = THRESHOLD_LEVEL,
    intensity_levels: tuple[float, float, float] = INTENSITY_LEVELS,
    interval: Interval = "mean",
) -> SeasonalIntensity:
    """MEM level of every week, from the complete seasons that ended before it.

    Parameters
    ----------
    weekly : array (regions, weeks)
        Weekly rates (or counts) on consecutive ISO weeks beginning ``week_starts``; NaN = missing.
    max_seasons : int
        At most this many of the latest usable past seasons are pooled (mem default 10).
    min_seasons : int
        Fewer usable past seasons than this: :data:`NOT_ENOUGH_SEASONS` (Vega et al. 2013
        recommend at least 5 [from memory]; the issue asks for 3 at least).
    min_coverage : float
        A past season is usable when its sum is positive (mem drops seasons summing to 0) and at
        least this share of its weeks has a value (common practice, no source).

    Notes
    -----
    A week's thresholds come from the seasons that ended before the week began; weeks between
    seasons are placed against the thresholds of the seasons ended so far. Its level is
    0 below the epidemic threshold, else 1 + the number of intensity thresholds it reaches
    (``>=``), so 1 low, 2 medium, 3 high, 4 very high.
    """
    w = np.asarray(weekly, dtype=np.float64)
    if w.ndim != 2:
        raise ValueError(f"weekly: expected (regions, weeks), got shape {w.shape}")
    days = np.asarray(week_starts, dtype="datetime64[D]")
    if days.shape != (w.shape[1],):
        raise ValueError(f"week_starts: expected {w.shape[1]} Mondays, got shape {days.shape}")
    if days.size and (np.any(np.diff(days).astype(np.int64) != 7)
                      or days[0].astype(dt.date).weekday() != 0):
        raise ValueError("week_starts: expected consecutive Mondays")
    if min_seasons < 3:
        raise ValueError(f"min_seasons: the baseline needs at least 3 past seasons, got "
                         f"{min_seasons}")
    if max_seasons < min_seasons:
        raise ValueError(f"max_seasons: {max_seasons} is fewer than min_seasons {min_seasons}")
    lay = season_layout(days, start_week=start_week, end_week=end_week)
    n_regions, n_weeks = w.shape
    n_seasons = len(lay.starts)
    grid = np.full((n_regions, n_seasons, max(lay.length, 1)), np.nan)
    inside = lay.season >= 0
    grid[:, lay.season[inside], lay.position[inside]] = w[:, inside]
    weeks_in = np.array([((e - s).days + 1) // 7 for s, e in zip(lay.starts, lay.ends,
                                                                  strict=True)])
    observed = np.isfinite(grid).sum(axis=-1)
    usable = (np.nansum(grid, axis=-1) > 0) & (observed >= min_coverage * weeks_in[None, :])
    timing = epidemic_timing(fill_inside(grid), delta=delta, smooth=smooth)
    # how many seasons had ended before each week began
    ends = np.array(lay.ends, dtype="datetime64[D]")
    ended = np.searchsorted(ends, days, side="left")  # seasons with end < day
    shape = (n_regions, n_weeks)
    out = {name: np.full(shape, np.nan) for name in ("epidemic", "medium", "high", "very_high")}
    used = np.zeros(shape, dtype=np.int64)
    for c in np.unique(ended):
        cols = ended == c
        past = usable & (np.arange(n_seasons)[None, :] < c)
        # the latest max_seasons usable ones
        from_end = np.cumsum(past[:, ::-1], axis=1)[:, ::-1]
        pick = past & (from_end <= max_seasons)
        if not pick.any():
            continue
        th = mem_thresholds(grid, use=pick, timing=timing, threshold_level=threshold_level,
                            intensity_levels=intensity_levels, interval=interval)
        enough = th.seasons >= min_seasons
        for name, val in (("epidemic", th.epidemic), ("medium", th.intensity[:, 0]),
                          ("high", th.intensity[:, 1]), ("very_high", th.intensity[:, 2])):
            out[name][:, cols] = np.where(enough, val, np.nan)[:, None]
        used[:, cols] = th.seasons[:, None]
    has_base = np.isfinite(out["epidemic"])
    value = np.isfinite(w)
    with np.errstate(invalid="ignore"):
        steps = ((w >= out["medium"]).astype(np.int8) + (w >= out["high"]).astype(np.int8)
                 + (w >= out["very_high"]).astype(np.int8))
        lvl = np.where(w >= out["epidemic"], 1 + steps, BELOW_THRESHOLD).astype(np.int8)
    state = np.where(~value, NO_VALUE, np.where(~has_base, NOT_ENOUGH_SEASONS, lvl)).astype(np.int8)
    level = np.where(state >= 0, state.astype(np.float64), np.nan)
    return SeasonalIntensity(state=state, level=level, epidemic=out["epidemic"],
                             medium=out["medium"], high=out["high"],
                             very_high=out["very_high"], seasons=used)
