"""Use case: did it work? Change points in transmission and changes in testing for a daily CSV.

``tierwise effects breaks`` reads ``date, cases`` and writes one row per segment between breaks
(the break that opens the segment on the same row); ``tierwise effects testing`` reads
``date, tests, positives`` and writes one row per break in testing. Files are read as by
``tierwise estimate`` (:func:`server.services.estimate_csv.read_daily_csv`): missing dates and empty
cells are missing, never zero. Broken input raises
:class:`~server.services.errors.InputFileError`; bad options
:class:`~server.services.errors.EstimateOptionError`.
"""

from __future__ import annotations

import datetime as dt
import inspect
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from server.indicators.changepoints import detect_changepoints
from server.indicators.level_breaks import detect_level_breaks
from server.indicators.testing import detect_testing_changes
from server.services.errors import EstimateOptionError, InputFileError
from server.services.estimate_csv import read_daily_csv

__all__ = [
    "BREAK_COLUMNS",
    "LEVEL_COLUMNS",
    "TESTING_COLUMNS",
    "BreakOptions",
    "EffectsTable",
    "breaks_table",
    "levels_table",
    "effects_csv",
    "testing_table",
    "write_effects",
]

BREAK_COLUMNS = (
    "segment", "start", "end", "days", "growth_rate", "growth_rate_lower", "growth_rate_upper",
    "doubling_time", "doubling_time_lower", "doubling_time_upper", "r", "r_lower", "r_upper",
    "break_date", "break_lower", "break_upper", "growth_change", "growth_change_lower",
    "growth_change_upper", "level_change", "level_change_lower", "level_change_upper",
    "transmission_date", "transmission_lower", "transmission_upper",
)
LEVEL_COLUMNS = (
    "segment", "start", "end", "days", "growth_rate", "growth_rate_lower", "growth_rate_upper",
    "r", "r_lower", "r_upper", "break_date", "break_lower", "break_upper", "growth_change",
    "growth_change_lower", "growth_change_upper",
)
TESTING_COLUMNS = (
    "date", "tests_per_100k_before", "tests_per_100k_after", "tests_ratio",
    "tests_ratio_lower", "tests_ratio_upper", "positivity_before", "positivity_after",
    "positivity_odds_ratio", "positivity_odds_ratio_lower", "positivity_odds_ratio_upper",
    "testing_change",
)


#: The kernel's smallest relative change of R reported as a break (``--min-change``).
KERNEL_MIN_CHANGE = float(inspect.signature(detect_changepoints).parameters["min_change"].default)
#: The kernel's days either side of a kink over which its change is measured
#: (``--local-window``).
KERNEL_LOCAL_WINDOW = int(
    inspect.signature(detect_changepoints).parameters["local_window"].default)


@dataclass(frozen=True)
class EffectsTable:
    """Rows of text cells under ``columns`` (empty cell: no value)."""

    kind: str
    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]


@dataclass(frozen=True, kw_only=True)
class BreakOptions:
    """Options of :func:`breaks_table` and :func:`testing_table`."""

    min_segment: int = 14
    max_breaks: int | None = None
    penalty: float = 1.0
    level: float = 0.95
    dispersion: str = "quasipoisson"
    si_mean: float = 4.7
    si_sd: float = 2.9
    population: float | None = None
    compare: int = 7
    min_ratio: float = 1.2
    shape: str = "kink"
    infection_delay: float | None = None
    #: SD of the infection-to-report delay (None: the kernel's 0.4 x the delay)
    delay_sd: float | None = None
    #: hinges smoothed by the generation interval and the delay (None: on with a delay)
    smoothing: bool | None = None
    #: smallest relative change of R reported as a break (kink model), the kernel's default
    min_change: float = KERNEL_MIN_CHANGE
    #: days either side of a kink over which its change of growth is measured (kink model;
    #: None: the whole adjacent segments)
    local_window: int | None = KERNEL_LOCAL_WINDOW
    #: the column of counts (``breaks``) or of positive values (``levels``) searched
    column: str = "cases"


def _num(value: float) -> str:
    return "" if math.isnan(value) else repr(float(value))


def _day(dates: tuple[dt.date, ...], index: int) -> str:
    return "" if index < 0 else dates[index].isoformat()


def _checked_options(o: BreakOptions) -> None:
    if o.dispersion not in ("quasipoisson", "poisson"):
        raise EstimateOptionError(
            f"--dispersion: expected quasipoisson or poisson, got {o.dispersion!r}")
    if o.shape not in ("kink", "step"):
        raise EstimateOptionError(f"--shape: expected kink or step, got {o.shape!r}")
    if o.local_window is not None and o.local_window < 1:
        raise EstimateOptionError(
            f"--local-window: expected a whole number of days >= 1 (0 for the whole "
            f"segments), got {o.local_window}")
    if o.delay_sd is not None and o.infection_delay is None:
        raise EstimateOptionError("--delay-sd: give --infection-delay too")
    if o.delay_sd is not None and not (math.isfinite(o.delay_sd) and o.delay_sd > 0):
        raise EstimateOptionError(f"--delay-sd: expected a positive number, got {o.delay_sd}")


def _shifted_day(dates: tuple[dt.date, ...], value: float) -> str:
    """The date ``value`` days after the first (rounded; may fall before the series)."""
    if math.isnan(value):
        return ""
    return (dates[0] + dt.timedelta(days=int(round(value)))).isoformat()


def _call(what: str, fn, *args, **kwargs):  # type: ignore[no-untyped-def]
    try:
        return fn(*args, **kwargs)
    except ValueError as exc:
        first = str(exc).splitlines()[0]
        name, _, rest = first.partition(": ")
        flag = "--" + name.replace("_", "-") if rest and " " not in name else what
        raise EstimateOptionError(f"{flag}: {rest or first}") from None


def breaks_table(path: Path, options: BreakOptions) -> EffectsTable:
    """Change points of the counts in ``options.column`` (``cases`` by default; e.g. hospital
    admissions) in the file at ``path``; one row per segment."""
    o = options
    _checked_options(o)
    col = o.column
    others = tuple(c for c in ("tests", "positives") if c != col)
    source = read_daily_csv(path, required=(col,), optional=others, counts=(col, *others))
    cases = source.values[col]
    if np.isfinite(cases).sum() < 2 * o.min_segment:
        raise InputFileError(source.path, "", f"{col}: {int(np.isfinite(cases).sum())} days "
                             f"with counts, fewer than 2 * --min-segment = {2 * o.min_segment}")
    shifts = None
    if o.shape == "kink" and o.population is not None and {"tests", "positives"} <= set(
            source.values):
        # testing changes move the level of cases on their own: a level shift each
        testing = _call("tests", detect_testing_changes, source.values["tests"],
                        source.values["positives"], population=[o.population],
                        min_segment=o.min_segment, compare=o.compare, min_ratio=o.min_ratio,
                        level=o.level)
        flagged = testing.day[0][testing.flagged[0]]
        shifts = np.asarray(flagged, dtype=np.int64)[None, :] if flagged.size else None
    res = _call(col, detect_changepoints, cases, min_segment=o.min_segment,
                max_breaks=o.max_breaks, penalty=o.penalty, dispersion=o.dispersion,
                level=o.level, si_mean=o.si_mean, si_sd=o.si_sd, shape=o.shape,
                level_shifts=shifts, infection_delay=o.infection_delay,
                delay_sd=o.delay_sd, smoothing=o.smoothing, min_change=o.min_change,
                local_window=o.local_window)
    dates = source.dates
    rows = []
    for j in range(int(res.n_breaks[0]) + 1):
        start, end = int(res.segment_start[0, j]), int(res.segment_end[0, j])
        cells = [str(j + 1), dates[start].isoformat(), dates[end - 1].isoformat(),
                 str(end - start)]
        cells += [_num(a[0, j]) for a in (
            res.growth, res.growth_lower, res.growth_upper, res.doubling_time,
            res.doubling_lower, res.doubling_upper, res.reproduction, res.reproduction_lower,
            res.reproduction_upper)]
        if j == 0:
            cells += [""] * 12
        else:
            k = j - 1
            cells += [_day(dates, int(res.breaks[0, k])), _day(dates, int(res.break_lower[0, k])),
                      _day(dates, int(res.break_upper[0, k]))]
            cells += [_num(a[0, k]) for a in (
                res.growth_change, res.growth_change_lower, res.growth_change_upper,
                res.level_change, res.level_change_lower, res.level_change_upper)]
            cells += [_shifted_day(dates, float(a[0, k])) for a in (
                res.transmission_day, res.transmission_lower, res.transmission_upper)]
        rows.append(tuple(cells))
    return EffectsTable("breaks", BREAK_COLUMNS, tuple(rows))


def levels_table(path: Path, options: BreakOptions) -> EffectsTable:
    """Kinks of the log of the positive values in ``options.column`` (a wastewater
    concentration; :func:`server.indicators.level_breaks.detect_level_breaks`, Gaussian errors
    on the log scale) in the file at ``path``; one row per segment. Days without a value (no
    sample) are missing."""
    o = options
    col = o.column
    source = read_daily_csv(path, required=(col,), nonnegative=(col,))
    values = source.values[col]
    seen = int((np.nan_to_num(values) > 0).sum())
    if seen < 2 * 7:
        raise InputFileError(source.path, "", f"{col}: {seen} days with a positive value, "
                             f"fewer than 14")
    res = _call(col, detect_level_breaks, values, min_segment=o.min_segment,
                max_breaks=o.max_breaks, penalty=o.penalty, level=o.level, si_mean=o.si_mean,
                si_sd=o.si_sd, min_change=o.min_change)
    dates, n = source.dates, len(source.dates)
    bounds = [0, *(int(b) for b in res.breaks[0, : int(res.n_breaks[0])]), n]
    rows = []
    for j in range(len(bounds) - 1):
        start, end = bounds[j], bounds[j + 1]
        cells = [str(j + 1), dates[start].isoformat(), dates[end - 1].isoformat(),
                 str(end - start)]
        cells += [_num(a[0, j]) for a in (
            res.growth, res.growth_lower, res.growth_upper, res.reproduction,
            res.reproduction_lower, res.reproduction_upper)]
        if j == 0:
            cells += [""] * 6
        else:
            k = j - 1
            cells += [_day(dates, int(res.breaks[0, k])), _day(dates, int(res.break_lower[0, k])),
                      _day(dates, int(res.break_upper[0, k]))]
            cells += [_num(a[0, k]) for a in (
                res.growth_change, res.growth_change_lower, res.growth_change_upper)]
        rows.append(tuple(cells))
    return EffectsTable("levels", LEVEL_COLUMNS, tuple(rows))


def testing_table(path: Path, options: BreakOptions) -> EffectsTable:
    """Breaks in ``tests`` (with ``positives``) in the file at ``path``; one row per break."""
    o = options
    if o.population is None:
        raise EstimateOptionError("--population: testing needs the population")
    source = read_daily_csv(path, required=("tests", "positives"),
                            counts=("tests", "positives"))
    t, p = source.values["tests"], source.values["positives"]
    over: NDArray[np.intp] = np.flatnonzero(np.nan_to_num(p) > np.nan_to_num(t, nan=np.inf))
    if over.size:
        i = int(over[0])
        raise InputFileError(source.path, f"line {source.lines[i]}",
                             f"positives: {p[i]:g} exceeds tests {t[i]:g}")
    if np.isfinite(t).sum() < 2 * o.min_segment:
        raise InputFileError(source.path, "", f"tests: {int(np.isfinite(t).sum())} days "
                             f"with counts, fewer than 2 * --min-segment = {2 * o.min_segment}")
    res = _call("tests", detect_testing_changes, t, p, population=[o.population],
                min_segment=o.min_segment, max_breaks=o.max_breaks, penalty=o.penalty,
                compare=o.compare, min_ratio=o.min_ratio, level=o.level)
    rows = []
    for k in range(int(res.n_breaks[0])):
        cells = [_day(source.dates, int(res.day[0, k]))]
        cells += [_num(a[0, k]) for a in (
            res.tests_before, res.tests_after, res.tests_ratio, res.tests_ratio_lower,
            res.tests_ratio_upper, res.positivity_before, res.positivity_after,
            res.positivity_odds_ratio, res.positivity_odds_lower, res.positivity_odds_upper)]
        cells.append("true" if res.flagged[0, k] else "false")
        rows.append(tuple(cells))
    return EffectsTable("testing", TESTING_COLUMNS, tuple(rows))


def effects_csv(table: EffectsTable) -> str:
    """The table as CSV text (floats as ``repr``: exact round trip)."""
    lines = [",".join(table.columns), *(",".join(r) for r in table.rows)]
    return "\n".join(lines) + "\n"


def write_effects(table: EffectsTable, path: Path) -> None:
    """Write :func:`effects_csv` to ``path``."""
    try:
        Path(path).write_text(effects_csv(table), encoding="utf-8")
    except OSError as exc:
        raise InputFileError(str(path), "", f"cannot be written ({exc.strerror})") from None
