"""Daily CSV files in and out of ``tierwise estimate``: reading the inputs, writing the tables.

An input has a ``date`` column (ISO 8601 ``YYYY-MM-DD``; rows in any order, each date once) and
value columns. Dates between the first and the last that no row names are *missing* (NaN), never
zero; so are empty cells (:func:`read_daily_csv`). Broken input raises
:class:`~server.services.errors.InputFileError` naming the file, the line and the column. Serial
intervals (:func:`read_serial_interval_csv`) and reporting triangles (:func:`read_triangle_csv`)
have their own layouts. An :class:`EstimateTable` is written with :func:`write_estimates`.
"""

from __future__ import annotations

import csv
import datetime as dt
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType

import numpy as np
from numpy.typing import NDArray

from server.indicators.serial_interval import (
    SerialInterval,
    discrete_serial_interval,
)
from server.services.errors import InputFileError

FloatArray = NDArray[np.float64]


_MISSING_TOKENS = frozenset({"", "na", "nan", "null"})


@dataclass(frozen=True)
class DailyTable:
    """A parsed daily input file.

    ``dates`` runs over every day from the first to the last date in the file; ``values`` maps each
    column to a float array over those days (NaN for missing days and empty cells); ``lines`` holds
    the file line of each day (0 for days the file does not name).
    """

    path: str
    dates: tuple[dt.date, ...]
    values: Mapping[str, FloatArray]
    lines: NDArray[np.int64]


@dataclass(frozen=True)
class EstimateTable:
    """Estimates laid out by day: ``columns[i]`` holds ``data[i]`` (one value per date).

    Columns named in ``flags`` are booleans stored as 1.0/0.0 and written ``true``/``false``;
    NaN is an empty cell everywhere.
    """

    kind: str
    dates: tuple[dt.date, ...]
    columns: tuple[str, ...]
    data: tuple[FloatArray, ...]
    flags: frozenset[str] = field(default_factory=frozenset)
    #: Sentences the caller must show beside the table (the CLI prints them on stderr).
    warnings: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if len(self.columns) != len(self.data):
            raise ValueError(f"columns: {len(self.columns)} names for {len(self.data)} arrays")
        for name, values in zip(self.columns, self.data, strict=True):
            if values.shape != (len(self.dates),):
                raise ValueError(f"{name}: shape {values.shape} for {len(self.dates)} dates")

    def column(self, name: str) -> FloatArray:
        """The values of one column."""
        return self.data[self.columns.index(name)]


def _open_rows(path: Path) -> tuple[list[str], list[tuple[int, list[str]]]]:
    try:
        handle = path.open(newline="", encoding="utf-8-sig")
    except FileNotFoundError:
        raise InputFileError(str(path), "", "file not found") from None
    except OSError as exc:
        raise InputFileError(str(path), "", f"cannot be read ({exc.strerror})") from None
    with handle:
        reader = csv.reader(handle)
        try:
            header = [h.strip() for h in next(reader)]
        except StopIteration:
            raise InputFileError(str(path), "line 1", "the file is empty") from None
        except (csv.Error, UnicodeDecodeError) as exc:
            raise InputFileError(str(path), "line 1", f"not a CSV file ({exc})") from None
        rows = []
        try:
            for row in reader:
                if any(cell.strip() for cell in row):
                    rows.append((reader.line_num, row))
        except (csv.Error, UnicodeDecodeError) as exc:
            raise InputFileError(str(path), f"line {reader.line_num + 1}", str(exc)) from None
    return header, rows


def _number(path: str, line: int, column: str, text: str, *, count: bool) -> float:
    text = text.strip()
    if text.lower() in _MISSING_TOKENS:
        return math.nan
    try:
        value = float(text)
    except ValueError:
        raise InputFileError(path, f"line {line}", f"{column}: {text!r} is not a number") from None
    if not math.isfinite(value):
        raise InputFileError(path, f"line {line}", f"{column}: {text!r} is not a finite number")
    if count and value < 0:
        raise InputFileError(path, f"line {line}", f"{column}: {text} is negative (a count)")
    if count and value != round(value):
        raise InputFileError(path, f"line {line}", f"{column}: {text} is not a whole number")
    return value


def _date(path: str, line: int, text: str) -> dt.date:
    try:
        return dt.date.fromisoformat(text.strip())
    except ValueError:
        raise InputFileError(
            path, f"line {line}", f"date: {text.strip()!r} is not an ISO 8601 date (YYYY-MM-DD)"
        ) from None


def read_daily_csv(
    path: Path,
    *,
    required: Sequence[str],
    optional: Sequence[str] = (),
    counts: Sequence[str] = (),
    nonnegative: Sequence[str] = (),
) -> DailyTable:
    """Read a daily CSV: a ``date`` column and the value columns ``required`` (+ ``optional``).

    Columns in ``counts`` must hold non-negative whole numbers, those in ``nonnegative``
    non-negative numbers. Other columns of the file are ignored.
    """
    name = str(path)
    header, rows = _open_rows(Path(path))
    wanted = ["date", *required]
    missing = [c for c in wanted if c not in header]
    if missing:
        found = ", ".join(h for h in header if h) or "nothing"
        raise InputFileError(name, "line 1", f"missing column {missing[0]!r} (found: {found})")
    use = [*required, *(c for c in optional if c in header)]
    index = {c: header.index(c) for c in ["date", *use]}
    if not rows:
        raise InputFileError(name, "line 2", "no data rows after the header")
    seen: dict[dt.date, int] = {}
    parsed: list[tuple[dt.date, list[float]]] = []
    for line, row in rows:
        cells = row + [""] * (len(header) - len(row))
        day = _date(name, line, cells[index["date"]])
        if day in seen:
            raise InputFileError(
                name, f"lines {seen[day]} and {line}", f"date: {day.isoformat()} appears twice"
            )
        seen[day] = line
        values = [
            _number(name, line, c, cells[index[c]], count=c in counts) for c in use
        ]
        for c, v in zip(use, values, strict=True):
            if c in nonnegative and v < 0:
                raise InputFileError(name, f"line {line}", f"{c}: {v!r} is negative")
        parsed.append((day, values))
    first, last = min(seen), max(seen)
    days = (last - first).days + 1
    out = np.full((len(use), days), np.nan)
    lines = np.zeros(days, dtype=np.int64)
    for day, values in parsed:
        i = (day - first).days
        out[:, i] = values
        lines[i] = seen[day]
    dates = tuple(first + dt.timedelta(days=i) for i in range(days))
    columns = MappingProxyType({c: out[j] for j, c in enumerate(use)})
    return DailyTable(path=name, dates=dates, values=columns, lines=lines)


def read_serial_interval_csv(path: Path) -> SerialInterval:
    """Read a discrete serial interval, a CSV with columns ``k`` (days, 0, 1, ...) and ``p``.

    Lags the file leaves out have probability 0; ``p`` at ``k = 0`` must be 0 and the
    probabilities must sum to 1 (within 1e-6).
    """
    name = str(path)
    header, rows = _open_rows(Path(path))
    for column in ("k", "p"):
        if column not in header:
            raise InputFileError(name, "line 1", f"missing column {column!r}")
    if not rows:
        raise InputFileError(name, "line 2", "no data rows after the header")
    ik, ip = header.index("k"), header.index("p")
    probs: dict[int, tuple[float, int]] = {}
    for line, row in rows:
        cells = row + [""] * (len(header) - len(row))
        k = _number(name, line, "k", cells[ik], count=True)
        p = _number(name, line, "p", cells[ip], count=False)
        if math.isnan(k) or math.isnan(p):
            raise InputFileError(name, f"line {line}", "k and p must both be given")
        if p < 0:
            raise InputFileError(name, f"line {line}", f"p: {p!r} is negative")
        if int(k) in probs:
            raise InputFileError(
                name, f"lines {probs[int(k)][1]} and {line}", f"k: {int(k)} appears twice"
            )
        if k == 0 and p != 0:
            raise InputFileError(name, f"line {line}", f"p: must be 0 at k = 0, got {p!r}")
        probs[int(k)] = (p, line)
    pmf = np.zeros(max(max(probs) + 1, 2))
    for k, (p, _) in probs.items():
        pmf[k] = p
    if abs(pmf.sum() - 1.0) > 1e-6:
        raise InputFileError(name, "", f"p: probabilities sum to {pmf.sum():.6g}, not 1")
    return discrete_serial_interval(pmf)


def delay_columns(header: Sequence[str]) -> list[str]:
    """The reporting-triangle columns ``d0, d1, ...`` of a nowcast file, in delay order."""
    found = sorted(
        (int(h[1:]), h) for h in header if len(h) > 1 and h[0] == "d" and h[1:].isdigit()
    )
    return [h for _, h in found]


def read_triangle_csv(path: Path) -> DailyTable:
    """Read a nowcast input: ``date`` and ``d0 .. dD`` (counts known at each delay)."""
    header, _ = _open_rows(Path(path))
    cols = delay_columns(header)
    if [int(c[1:]) for c in cols] != list(range(len(cols))) or len(cols) < 2:
        raise InputFileError(
            str(path), "line 1", f"expected delay columns d0, d1, ... (at least 2), found {cols}"
        )
    return read_daily_csv(path, required=cols, counts=cols)


def _cell(value: float, flag: bool) -> str:
    if math.isnan(value):
        return ""
    if flag:
        return "true" if value else "false"
    return repr(float(value))


def estimates_csv(table: EstimateTable) -> str:
    """The table as CSV text: ``date`` then the columns; floats as ``repr`` (exact round trip)."""
    lines = [",".join(("date", *table.columns))]
    flags = [c in table.flags for c in table.columns]
    for i, day in enumerate(table.dates):
        cells = (_cell(float(col[i]), f) for col, f in zip(table.data, flags, strict=True))
        lines.append(",".join((day.isoformat(), *cells)))
    return "\n".join(lines) + "\n"


def write_estimates(table: EstimateTable, path: Path) -> None:
    """Write :func:`estimates_csv` to ``path``."""
    try:
        Path(path).write_text(estimates_csv(table), encoding="utf-8")
    except OSError as exc:
        raise InputFileError(str(path), "", f"cannot be written ({exc.strerror})") from None
