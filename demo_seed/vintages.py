"""Turn simulated series into vintaged observation rows (what became known on which day).

All names, places and numbers are invented for the demo.

A row says: for ``(region, measure, ref_date)`` the value known from ``known_on`` on is
``value``. Only new or changed values produce rows, as a feed of daily vintages would.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from demo_seed.errors import ScenarioArgumentError

__all__ = ["RowBlock", "delayed_report_rows", "first_report_rows", "rows_to_frame"]


@dataclass(frozen=True)
class RowBlock:
    """Rows of one measure as parallel arrays; day indices count from the first date."""

    measure: str
    region: np.ndarray
    ref_day: np.ndarray
    known_day: np.ndarray
    value: np.ndarray


def first_report_rows(values: np.ndarray, codes: tuple[str, ...], measure: str,
                      lag: int) -> RowBlock:
    """Rows for values that are final on first report, known ``lag`` days after ref date.

    Days whose value is NaN (no sample, no report) give no row; rows that would become
    known after the last day are dropped.
    """
    if lag < 0:
        raise ScenarioArgumentError("lag", lag, "must be non-negative")
    units, days = values.shape
    if len(codes) != units:
        raise ScenarioArgumentError("codes", len(codes), f"must name {units} rows")
    unit, ref = np.nonzero(~np.isnan(values))
    keep = ref + lag <= days - 1
    unit, ref = unit[keep], ref[keep]
    return RowBlock(measure=measure, region=np.asarray(codes, dtype=object)[unit],
                    ref_day=ref, known_day=ref + lag, value=values[unit, ref])


def delayed_report_rows(by_delay: np.ndarray, codes: tuple[str, ...],
                        measure: str) -> RowBlock:
    """Rows for counts that arrive over several days (revised upward).

    Parameters
    ----------
    by_delay : numpy.ndarray
        ``by_delay[i, t, d]`` counts with reference day *t* reported on day *t + d*.

    Notes
    -----
    The value known on day :math:`v` for reference day *t* is
    :math:`\\sum_{d \\le v - t} x_{i,t,d}`. A row is emitted on the reference day itself
    (first report, possibly 0) and on each later day that adds counts; nothing after the
    last day.
    """
    units, days, delays = by_delay.shape
    if len(codes) != units:
        raise ScenarioArgumentError("codes", len(codes), f"must name {units} rows")
    cumulative = np.cumsum(by_delay, axis=2)
    d = np.arange(delays)[None, None, :]
    t = np.arange(days)[None, :, None]
    emit = ((d == 0) | (by_delay > 0)) & (t + d <= days - 1)
    unit, ref, delay = np.nonzero(emit)
    return RowBlock(measure=measure, region=np.asarray(codes, dtype=object)[unit],
                    ref_day=ref, known_day=ref + delay, value=cumulative[unit, ref, delay])


def rows_to_frame(blocks: list[RowBlock], dates: np.ndarray) -> pd.DataFrame:
    """Stack blocks into the observation frame, sorted by known_on, measure, region, ref_date.

    Columns: ``region`` (str), ``measure`` (str), ``ref_date`` and ``known_on``
    (datetime64, midnight), ``value`` (float64).
    """
    region = np.concatenate([b.region for b in blocks])
    measure = np.concatenate([np.full(b.value.shape[0], b.measure, dtype=object)
                              for b in blocks])
    ref = np.concatenate([b.ref_day for b in blocks])
    known = np.concatenate([b.known_day for b in blocks])
    value = np.concatenate([b.value for b in blocks]).astype(np.float64)
    frame = pd.DataFrame({
        "region": region.astype(str),
        "measure": measure.astype(str),
        "ref_date": dates[ref].astype("datetime64[s]"),
        "value": value,
        "known_on": dates[known].astype("datetime64[s]"),
    })
    frame = frame.sort_values(["known_on", "measure", "region", "ref_date"], kind="stable")
    return frame.reset_index(drop=True)
