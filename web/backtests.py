"""Server-side SVG tier strip of a backtest: one row per district, one column per day.

Consecutive days of one tier are drawn as one rectangle (a run), so a strip of a few hundred
days and districts stays a few kilobytes; colours are the tier colours of :mod:`web.palette`
(grey for insufficient data). The template draws the rectangles; a table beside the strip lists
each district's tier changes for readers who cannot use the picture.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from server.services.backtest_jobs import RulesetFigures
from web.palette import NO_TIER, OUTLINE, tier_colours

__all__ = ["OUTLINE", "StripRow", "StripRun", "TierStrip", "tier_strip"]

LABEL_WIDTH = 150.0
ROW_HEIGHT = 14.0
TICK_LABEL_PX = 55  # room for one month label
ROW_GAP = 2.0
PLOT_WIDTH = 600.0
AXIS_HEIGHT = 18.0


@dataclass(frozen=True, kw_only=True)
class StripRun:
    x: float
    width: float
    fill: str
    tier: int
    days: int


@dataclass(frozen=True, kw_only=True)
class StripRow:
    code: str
    name: str
    y: float
    runs: tuple[StripRun, ...]


@dataclass(frozen=True, kw_only=True)
class TierStrip:
    width: float
    height: float
    label_width: float
    row_height: float
    day_width: float
    rows: tuple[StripRow, ...]
    ticks: tuple[tuple[float, str], ...]  # x and label of month starts


def _runs(row: np.ndarray) -> list[tuple[int, int, int]]:
    """(first day, length, tier) of the runs of equal values in ``row``."""
    if row.size == 0:
        return []
    edges = np.flatnonzero(np.diff(row)) + 1
    starts = np.concatenate([[0], edges])
    ends = np.concatenate([edges, [row.size]])
    return [(int(a), int(b - a), int(row[a])) for a, b in zip(starts, ends, strict=True)]


def tier_strip(figures: RulesetFigures) -> TierStrip:
    """The strip geometry of one replay: rows in the order of ``figures.regions``.

    Notes
    -----
    Day ``j`` of ``D`` days spans ``x = L + j * W / D`` to ``L + (j + 1) * W / D`` with label
    width ``L`` and plot width ``W``.
    """
    tier = figures.tier
    n_days = tier.shape[1]
    day_w = PLOT_WIDTH / max(n_days, 1)
    colours = tier_colours(max(figures.n_tiers, 1))
    rows = []
    for i, region in enumerate(figures.regions):
        y = AXIS_HEIGHT + i * (ROW_HEIGHT + ROW_GAP)
        runs = tuple(
            StripRun(
                x=round(LABEL_WIDTH + a * day_w, 2), width=round(n * day_w, 2),
                fill=colours[t].fill if 0 <= t < len(colours) else NO_TIER, tier=t, days=n,
            )
            for a, n, t in _runs(tier[i])
        )
        rows.append(StripRow(code=region.code, name=region.name, y=y, runs=runs))
    start = np.datetime64(figures.start, "D")
    days = start + np.arange(n_days)
    month_starts = np.flatnonzero(days.astype("datetime64[M]").astype("datetime64[D]") == days)
    # Label every k-th month so that labels ("2026-03", about 45 px at 10 px type) never overlap.
    every = max(1, math.ceil(TICK_LABEL_PX / (30.4 * day_w)))
    month_starts = month_starts[::every]
    ticks = tuple(
        (round(LABEL_WIDTH + int(j) * day_w, 2), str(days[j].astype("datetime64[M]")))
        for j in month_starts
    )
    height = AXIS_HEIGHT + len(rows) * (ROW_HEIGHT + ROW_GAP)
    return TierStrip(
        width=LABEL_WIDTH + PLOT_WIDTH, height=height, label_width=LABEL_WIDTH,
        row_height=ROW_HEIGHT, day_width=day_w, rows=tuple(rows), ticks=ticks,
    )
