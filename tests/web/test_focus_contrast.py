"""The focus ring's colours against every background a focusable element sits on.

WCAG 2.1 success criterion 1.4.11 (non-text contrast) asks for at least 3:1 between a focus
indicator and the colours next to it; the ratio is the WCAG 2.x contrast ratio, computed by
:func:`web.palette.contrast_ratio`. The colours are read from the stylesheet itself.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from web.palette import contrast_ratio

CSS = (Path(__file__).resolve().parents[2] / "web" / "static" / "tierwise.css").read_text()


def _var(name: str) -> str:
    found = re.search(rf"--{name}:\s*(#[0-9a-fA-F]{{6}})", CSS)
    assert found is not None, f"--{name} is not defined in tierwise.css"
    return found.group(1)


def _rule_colour(selector: str, prop: str = "background") -> str:
    found = re.search(rf"(?m)^{re.escape(selector)}\s*{{[^}}]*?{prop}:\s*(#[0-9a-fA-F]{{6}})", CSS)
    assert found is not None, f"no {prop} colour for {selector}"
    return found.group(1)


# Where links, buttons and form fields are drawn on a light background.
LIGHT = {
    "page": lambda: _var("paper"),
    "panels, cards, inputs": lambda: "#ffffff",
    "table heads": lambda: _var("accent-soft"),
    "cautions": lambda: _var("caution"),
    "pending rows": lambda: _rule_colour("tr.pending-row"),
    "notices": lambda: _rule_colour(".notice"),
    "error messages": lambda: _rule_colour(".error-message"),
}
# The mastheads (nav links, language switch, sign-out button, the skip link drawn over them).
DARK = {
    "public masthead": lambda: _var("ink"),
    "staff masthead": lambda: _var("accent"),
}


def test_old_focus_colour_fails_and_is_gone() -> None:
    # The colour found in the user trial: about 2.2:1 on the page (under 3:1).
    assert contrast_ratio("#e0a100", "#fbfaf7") < 3
    assert "#e0a100" not in CSS.lower()


@pytest.mark.parametrize("where", sorted(LIGHT))
def test_focus_ring_on_light_backgrounds(where: str) -> None:
    assert contrast_ratio(_var("focus"), LIGHT[where]()) >= 3


@pytest.mark.parametrize("where", sorted(DARK))
def test_focus_ring_on_the_mastheads(where: str) -> None:
    assert contrast_ratio(_var("focus-on-dark"), DARK[where]()) >= 3


def test_every_focus_outline_uses_the_checked_colours() -> None:
    outlines = re.findall(r"outline(?:-color)?:\s*([^;}]+)", CSS)
    colours = {o.strip() for o in outlines if "none" not in o}
    assert colours, "no focus outline found"
    for value in colours:
        assert re.search(r"var\(--focus(-on-dark)?\)", value), value
    assert re.search(r"\.masthead a:focus[^{]*{\s*outline-color:\s*var\(--focus-on-dark\)", CSS)
