"""The words of a chart (Plotly JSON from ``web/charts.py``) in the page's language.

The figure builders stay pure and English (their names are also the API's and the tests'); the
``figure`` filter (``web/templating.py``) reads the figure's JSON once more at render time and
translates what a reader sees: trace names (the legend), titles, axis titles, tick labels and
annotations (subplot titles). Fixed words are catalog messages marked below; names that hold a
tier or a scenario follow the patterns below, then :func:`web.words.translate_sentence` (numbers,
dates, the policy's tier names, labels and scenario labels). Dates on the axes and the modebar
are written by plotly.js in the page's language (``static/charts.js`` registers ``de``).
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable
from typing import Any

from web.words import N_, translate_sentence

__all__ = ["CHART_PATTERNS", "CHART_WORDS", "translate_figure"]

CHART_WORDS: tuple[str, ...] = (
    N_("estimate"), N_("95% interval"), N_("recommended"), N_("official (published)"),
    N_("prepare signal"), N_("Tier: official and recommended"), N_("reported so far"),
    N_("95% interval of the nowcast"), N_("nowcast (expected final count)"), N_("median"),
    N_("50% band"), N_("90% band"), N_("beds in use"), N_("staffed beds"),
    N_("R before and after each event (95% intervals)"), N_("before"), N_("after"),
    N_("admissions break"), N_("wastewater break"), N_("break"), N_("tier change"),
    N_("measure start"), N_("measure end"), N_("school holidays"), N_("testing change"),
    N_("testing change (dismissed)"), N_("other"), N_("Cases (sum of the districts)"),
    N_("Hospital admissions (sum of the districts)"),
)

#: trace names and titles built around a name (web/charts.py), matched on the whole text
CHART_PATTERNS: tuple[tuple[str, str], ...] = (
    (r"^leave (?P<tier>.+) below$", N_("leave %(tier)s below")),
    (r"^(?P<tier>.+) from$", N_("%(tier)s from")),
    (r"^(?P<share>[\d.]+)% of staffed beds$", N_("%(share)s%% of staffed beds")),
    (r"^Hospital admissions (?P<scenario>.+)$", N_("Hospital admissions %(scenario)s")),
    (r"^Cases: reported and nowcast$", N_("Cases: reported and nowcast")),
)
_COMPILED = tuple((re.compile(p), m) for p, m in CHART_PATTERNS)


def _text(text: str, gettext: Callable[[str], str], lang: str, words: dict[str, str]) -> str:
    if not isinstance(text, str) or not text or lang == "en":
        return text
    out = gettext(text)
    if out == text:
        for rx, message in _COMPILED:
            m = rx.match(text)
            if m is not None:
                german = gettext(message)
                names = {k: (words.get(v, v)) for k, v in m.groupdict().items()}
                out = german % names if german != message else text
                break
    return translate_sentence(out, gettext, lang, words)


def _axis_words(axis: dict[str, Any], tr: Callable[[str], str]) -> None:
    title = axis.get("title")
    if isinstance(title, dict) and "text" in title:
        title["text"] = tr(title["text"])
    if isinstance(axis.get("ticktext"), list):
        axis["ticktext"] = [tr(t) for t in axis["ticktext"]]


def translate_figure(figure: str, gettext: Callable[[str], str], lang: str,
                     words: dict[str, str] | None = None) -> str:
    """``figure`` (Plotly JSON) with the words a reader sees in ``lang``; English unchanged."""
    if lang == "en" or not figure:
        return figure
    table = words or {}

    def tr(text: str) -> str:
        return _text(text, gettext, lang, table)

    fig = json.loads(figure)
    for trace in fig.get("data", []):
        if "name" in trace:
            trace["name"] = tr(trace["name"])
        if trace.get("type") == "scatter" and isinstance(trace.get("x"), list) and all(
                x in ("before", "after") for x in trace["x"]):
            trace["x"] = [tr(x) for x in trace["x"]]
    layout = fig.get("layout", {})
    title = layout.get("title")
    if isinstance(title, dict) and "text" in title:
        title["text"] = tr(title["text"])
    for key, value in layout.items():
        if key.startswith(("xaxis", "yaxis")) and isinstance(value, dict):
            _axis_words(value, tr)
    for note in layout.get("annotations", []):
        if isinstance(note, dict) and "text" in note:
            note["text"] = tr(note["text"])
    return json.dumps(fig, separators=(",", ":"))
