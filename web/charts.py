"""Chart builders: pure functions from page-data objects to Plotly figures and SVG sparklines.

Figures are serialised with ``figure_json`` and drawn in the browser by ``/static/charts.js``
with the plotly.js bundled in the installed ``plotly`` package (no CDN, no inline script). Every
chart has a table beside it on the page, so nothing depends on JavaScript.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import date

import plotly.graph_objects as go

from server.readmodels.capacity_pages import AreaCapacity, Fan
from server.readmodels.district_marks import DistrictMarks
from server.readmodels.dossier import CriterionSeries, DistrictDossier
from server.services.district_nowcasts import NowcastSeries
from server.services.event_effects import EventEffect
from web.palette import INK, OUTLINE, tier_colours

__all__ = [
    "add_marks", "admissions_fan_figure", "capacity_fan_figure", "chart_marks", "criterion_figure",
    "counts_figure", "effects_figure", "figure_json", "nowcast_figure", "sparkline_points",
    "timeline_figure",
]

_LAYOUT = {
    "margin": {"l": 56, "r": 16, "t": 36, "b": 36}, "height": 280, "paper_bgcolor": "#fbfaf7",
    "plot_bgcolor": "#ffffff",
    "font": {"family": "system-ui, sans-serif", "size": 12, "color": INK},
    "legend": {"orientation": "h", "y": -0.18}, "hovermode": "x unified",
}


def _nan(values: Sequence[float | None]) -> list[float | None]:
    return [None if v is None or not math.isfinite(v) else v for v in values]


def criterion_figure(
    series: CriterionSeries, tier_names: Sequence[str], tier: int | None = None
) -> go.Figure:
    """The estimate with its confidence band and the two thresholds that matter at ``tier``.

    Drawn are the exit threshold of ``tier`` (under it, for the release period, the tier is left)
    and the enter threshold of the next tier (over it, for the confirmation period, the tier
    rises), as they stood each day. The y axis covers the estimate and both thresholds; a
    confidence band wider than that is cut at the top, so thresholds stay readable in small
    districts. ``tier`` None (no tier known) draws the enter threshold of tier 1.
    """
    dates = [d.isoformat() for d in series.dates]
    colours = tier_colours(len(tier_names))
    current = 0 if tier is None or tier < 0 else min(tier, len(tier_names) - 1)
    fig = go.Figure()
    shown: list[float] = []
    lines = []
    if current >= 1 and current - 1 < len(series.exit):
        lines.append((series.exit[current - 1], current, "dot",
                      f"leave {tier_names[current]} below"))
    if current + 1 < len(tier_names) and current < len(series.enter):
        lines.append((series.enter[current], current + 1, "dash",
                      f"{tier_names[current + 1]} from"))
    for values, t, dash, label in lines:
        if all(v is None for v in values):
            continue
        fig.add_trace(go.Scatter(x=dates, y=_nan(values), mode="lines", name=label, line={
            "color": colours[t].fill if t > 0 else OUTLINE, "width": 2, "dash": dash,
            "shape": "hv"}))
        shown += [v for v in values if v is not None and math.isfinite(v)]
    if any(v is not None for v in series.lower):
        fig.add_trace(go.Scatter(x=dates, y=_nan(series.upper), mode="lines",
                                 line={"width": 0}, showlegend=False, hoverinfo="skip"))
        fig.add_trace(go.Scatter(x=dates, y=_nan(series.lower), mode="lines", fill="tonexty",
                                 fillcolor="rgba(27,36,48,0.18)", line={"width": 0},
                                 name="95% interval"))
    fig.add_trace(go.Scatter(x=dates, y=_nan(series.value), mode="lines",
                             line={"color": INK, "width": 2}, name="estimate"))
    unit = f" ({series.unit})" if series.unit else ""
    fig.update_layout(title={"text": series.label + unit, "x": 0}, **_LAYOUT)
    fig.update_yaxes(rangemode="tozero", gridcolor="#ebe8e1")
    top = max(shown + [v for v in _nan(series.value) if v is not None], default=None)
    if top is not None and top > 0:
        fig.update_yaxes(range=[0, top * 1.2])
    return fig


def _alpha(hex_colour: str, a: float) -> str:
    h = hex_colour.lstrip("#")
    r, g, b = (int(h[i:i + 2], 16) for i in (0, 2, 4))
    return f"rgba({r},{g},{b},{a})"


def timeline_figure(dossier: DistrictDossier) -> go.Figure:
    """Official versus recommended tier by day, with prepare-signal days marked."""
    dates = [d.isoformat() for d in dossier.dates]
    names = dossier.tier_names
    fig = go.Figure()
    fig.add_trace(go.Scatter(
        x=dates, y=[t if t >= 0 else None for t in dossier.recommended], mode="lines",
        line={"color": "#6f5f9e", "width": 2, "dash": "dash", "shape": "hv"}, name="recommended"))
    fig.add_trace(go.Scatter(
        x=dates, y=list(dossier.official), mode="lines",
        line={"color": INK, "width": 3, "shape": "hv"}, name="official (published)"))
    if dossier.prepare_days:
        by_day: dict[date, list[str]] = {}
        for day, sid in dossier.prepare_days:
            by_day.setdefault(day, []).append(sid)
        fig.add_trace(go.Scatter(
            x=[d.isoformat() for d in by_day], y=[-0.35] * len(by_day), mode="markers",
            marker={"symbol": "triangle-up", "size": 9, "color": "#b08900",
                        "line": {"color": OUTLINE, "width": 1}},
            text=[", ".join(v) for v in by_day.values()], name="prepare signal",
            hovertemplate="%{x}: %{text}<extra></extra>"))
    fig.update_layout(title={"text": "Tier: official and recommended", "x": 0}, **_LAYOUT)
    fig.update_yaxes(tickvals=list(range(len(names))), ticktext=list(names),
                     range=[-0.6, len(names) - 0.5], gridcolor="#ebe8e1")
    return fig


def nowcast_figure(series: NowcastSeries, label: str = "Cases") -> go.Figure:
    """Daily counts as reported so far (bars) and the nowcast of the days still being reported
    (dashed line) with its 95 % predictive band."""
    dates = [d.isoformat() for d in series.dates]
    fig = go.Figure()
    fig.add_trace(go.Bar(x=dates, y=_nan([v if v is not None else math.nan
                                          for v in series.reported]),
                         marker={"color": "#9aa5b1"}, name="reported so far"))
    upper = [v if v is not None else math.nan for v in series.upper]
    lower = [v if v is not None else math.nan for v in series.lower]
    fig.add_trace(go.Scatter(x=dates, y=_nan(upper), mode="lines", line={"width": 0},
                             showlegend=False, hoverinfo="skip"))
    fig.add_trace(go.Scatter(x=dates, y=_nan(lower), mode="lines", fill="tonexty",
                             fillcolor="rgba(111,95,158,0.22)", line={"width": 0},
                             name="95% interval of the nowcast"))
    fig.add_trace(go.Scatter(
        x=dates, y=_nan([v if v is not None else math.nan for v in series.nowcast]),
        mode="lines+markers", line={"color": "#6f5f9e", "width": 2, "dash": "dash"},
        marker={"size": 5}, name="nowcast (expected final count)"))
    fig.update_layout(title={"text": f"{label}: reported and nowcast", "x": 0}, **_LAYOUT)
    fig.update_yaxes(rangemode="tozero", gridcolor="#ebe8e1")
    return fig


def counts_figure(dates: Sequence[date], values: Sequence[float | None], label: str
                  ) -> go.Figure:
    """Daily counts as bars (a gap where the count is unknown), titled ``label``."""
    fig = go.Figure(go.Bar(x=[d.isoformat() for d in dates],
                           y=_nan(values),
                           marker={"color": "#9aa5b1"}, name=label))
    fig.update_layout(title={"text": label, "x": 0}, **_LAYOUT)
    fig.update_yaxes(rangemode="tozero", gridcolor="#ebe8e1")
    return fig


def _fan_traces(fig: go.Figure, fan: Fan, colour: str = "111,95,158") -> None:
    """50 % and 90 % predictive bands and the median of one scenario's fan."""
    dates = [d.isoformat() for d in fan.dates]

    def y(values: Sequence[float | None]) -> list[float | None]:
        return _nan([math.nan if v is None else v for v in values])

    for lo, hi, alpha, name in ((fan.lower90, fan.upper90, 0.14, "90% band"),
                                (fan.lower50, fan.upper50, 0.30, "50% band")):
        fig.add_trace(go.Scatter(x=dates, y=y(hi), mode="lines", line={"width": 0},
                                 showlegend=False, hoverinfo="skip"))
        fig.add_trace(go.Scatter(x=dates, y=y(lo), mode="lines", fill="tonexty",
                                 fillcolor=f"rgba({colour},{alpha})", line={"width": 0},
                                 name=name))
    fig.add_trace(go.Scatter(x=dates, y=y(fan.median), mode="lines",
                             line={"color": f"rgb({colour})", "width": 2, "dash": "dash"},
                             name="median"))


def capacity_fan_figure(area: AreaCapacity, fan: Fan) -> go.Figure:
    """ICU beds in use (line), the scenario's forecast fan, staffed beds and the configured
    share of them (held at the last day's value over the forecast)."""
    fig = go.Figure()
    past = [d.isoformat() for d in area.dates]
    future = [d.isoformat() for d in fan.dates]
    fig.add_trace(go.Scatter(x=past, y=_nan([math.nan if v is None else v
                                             for v in area.occupied]),
                             mode="lines", line={"color": INK, "width": 2}, name="beds in use"))
    _fan_traces(fig, fan)
    staffed = [math.nan if v is None else v for v in area.staffed]
    now = area.staffed_now if area.staffed_now is not None else math.nan
    fig.add_trace(go.Scatter(x=past + future, y=_nan(staffed + [now] * len(future)),
                             mode="lines", line={"color": OUTLINE, "width": 1.5},
                             name="staffed beds"))
    fig.add_trace(go.Scatter(
        x=past + future, y=_nan([v * area.share / 100 for v in staffed + [now] * len(future)]),
        mode="lines", line={"color": "#a23b2a", "width": 1.5, "dash": "dot"},
        name=f"{area.share:g}% of staffed beds"))
    fig.update_layout(title={"text": fan.label, "x": 0}, **_LAYOUT)
    fig.update_yaxes(rangemode="tozero", gridcolor="#ebe8e1")
    return fig


def admissions_fan_figure(fan: Fan) -> go.Figure:
    """One scenario's forecast of daily hospital admissions: median, 50 % and 90 % bands."""
    fig = go.Figure()
    _fan_traces(fig, fan)
    fig.update_layout(title={"text": f"Hospital admissions {fan.label}", "x": 0}, **_LAYOUT)
    fig.update_yaxes(rangemode="tozero", gridcolor="#ebe8e1")
    return fig


def effects_figure(events: Sequence[EventEffect], columns: int = 4) -> go.Figure | None:
    """Small multiples: R before and after each estimated event, with 95 % intervals.

    One panel per event whose estimate is ready (same y axis for all, a dotted line at R = 1);
    None when no event has an estimate. The page's table carries the same numbers."""
    from plotly.subplots import make_subplots

    ready = [e for e in events if e.status == "ready"]
    if not ready:
        return None
    cols = min(columns, len(ready))
    rows = math.ceil(len(ready) / cols)
    titles = [f"{e.region_name} {e.day.isoformat()}" for e in ready]
    fig = make_subplots(rows=rows, cols=cols, subplot_titles=titles, shared_yaxes=True)
    for k, e in enumerate(ready):
        est = [e.rt_before[0], e.rt_after[0]]
        fig.add_trace(go.Scatter(
            x=["before", "after"], y=_nan(est), mode="markers", showlegend=False,
            marker={"color": INK, "size": 8},
            error_y={"type": "data", "symmetric": False,
                     "array": _nan([e.rt_before[2] - est[0], e.rt_after[2] - est[1]]),
                     "arrayminus": _nan([est[0] - e.rt_before[1], est[1] - e.rt_after[1]])},
            hovertemplate="R %{x}: %{y:.2f}<extra></extra>"), row=k // cols + 1, col=k % cols + 1)
    fig.add_hline(y=1.0, line={"color": OUTLINE, "dash": "dot", "width": 1})
    layout = {**_LAYOUT, "height": 200 * rows + 40, "hovermode": "closest"}
    fig.update_layout(title={"text": "R before and after each event (95% intervals)", "x": 0},
                      **layout)
    fig.update_annotations(font={"size": 11})
    return fig


#: How each kind of mark is drawn: colour, dash.
MARK_STYLES = {"break": ("#5b6770", "dot"), "event": ("#6f5f9e", "solid"),
               "testing": ("#b06000", "dash"), "admissions": ("#2f6f8f", "dashdot"),
               "wastewater": ("#4f7f3a", "dashdot")}


def chart_marks(marks: DistrictMarks, start: date, end: date
                ) -> list[tuple[date, str, str]]:
    """(day, style, label) of the marks within ``start..end``: breaks in cases, in admissions
    and in wastewater, events (tier changes and recorded events) and testing changes (a
    dismissed one says so)."""
    out = [(b.day, "break", "break") for b in marks.breaks]
    out += [(b.day, b.stream, f"{b.stream} break") for b in marks.stream_breaks]
    out += [(e.day, "event", e.kind.replace("_", " ")) for e in marks.events]
    out += [(t.day, "testing", "testing change" + (
        " (dismissed)" if t.verdict is not None and t.verdict.verdict == "dismissed" else ""))
        for t in marks.testing]
    return sorted(m for m in out if start <= m[0] <= end)


def add_marks(fig: go.Figure, marks: DistrictMarks, start: date, end: date) -> go.Figure:
    """Vertical lines with a label at the top for every mark of :func:`chart_marks` (the page
    lists the same marks with their estimates in a table under the charts)."""
    for day, style, label in chart_marks(marks, start, end):
        colour, dash = MARK_STYLES[style]
        x = day.isoformat()
        fig.add_shape(type="line", xref="x", yref="paper", x0=x, x1=x, y0=0, y1=1,
                      line={"color": colour, "width": 1.5, "dash": dash}, name=label)
        fig.add_annotation(x=x, y=1, xref="x", yref="paper", text=label, showarrow=False,
                           textangle=-90, xanchor="right", yanchor="top",
                           font={"size": 10, "color": colour})
    return fig


def figure_json(fig: go.Figure) -> str:
    """The figure as JSON for ``data-figure`` (drawn by /static/charts.js)."""
    return str(fig.to_json())


def sparkline_points(
    values: Sequence[float], *, width: float = 96, height: float = 22
) -> list[str]:
    """SVG polyline point lists (one per run of known values) scaled into ``width x height``.

    Missing values (NaN) break the line instead of being drawn as zero.
    """
    finite = [v for v in values if math.isfinite(v)]
    if not finite or len(values) < 2:
        return []
    lo, hi = min(finite), max(finite)
    span = hi - lo if hi > lo else 1.0
    step = width / (len(values) - 1)
    runs: list[list[str]] = [[]]
    for i, v in enumerate(values):
        if not math.isfinite(v):
            if runs[-1]:
                runs.append([])
            continue
        y = height - 1 - (v - lo) / span * (height - 2)
        runs[-1].append(f"{i * step:.1f},{y:.1f}")
    return [" ".join(r) for r in runs if r]
