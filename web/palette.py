"""Tier colours: tierwise's own sequential scale from pale sand to deep indigo, and contrast checks.

The scale is sequential (lightness falls monotonically with the tier), so it stays ordered for
readers with any type of colour-vision deficiency and in greyscale print; the tier's name is
always written beside the colour. Text on each swatch is ink or white, whichever contrasts more.

Contrast follows WCAG 2.1: relative luminance ``L = 0.2126 R + 0.7152 G + 0.0722 B`` of the
linearised sRGB channels, and ratio ``(L1 + 0.05) / (L2 + 0.05)``; AA needs 4.5:1 for text and
3:1 for the boundaries of graphical objects.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

__all__ = [
    "INK",
    "NO_TIER",
    "PAPER",
    "STOPS",
    "TierColour",
    "contrast_ratio",
    "relative_luminance",
    "tier_colours",
]

INK = "#1b2430"
PAPER = "#fbfaf7"
WHITE = "#ffffff"
#: Anchor colours of the scale, lightest first (pale sand, dune, heather, slate violet, indigo).
STOPS: tuple[str, ...] = ("#f4ead3", "#dcc3a1", "#b497b0", "#6f5f9e", "#2e2a6b")
#: Districts with no published tier yet: light grey, and a hatch on the map.
NO_TIER = "#e4e2dd"
#: Outline drawn round every map shape and swatch.
OUTLINE = "#4a5563"
#: Text contrast aimed for on swatches (WCAG 2.1 AA asks 4.5:1; a little margin).
TEXT_CONTRAST = 4.6


@dataclass(frozen=True, kw_only=True)
class TierColour:
    level: int
    fill: str
    text: str


def _rgb(hex_colour: str) -> np.ndarray:
    h = hex_colour.lstrip("#")
    if len(h) != 6:
        raise ValueError(f"hex_colour must look like #rrggbb, got {hex_colour!r}")
    return np.array([int(h[i:i + 2], 16) for i in (0, 2, 4)], dtype=np.float64) / 255.0


def _linear(c: np.ndarray) -> np.ndarray:
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def _encode(lin: np.ndarray) -> str:
    c = np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * np.power(np.clip(lin, 0, 1), 1 / 2.4)
                 - 0.055)
    r, g, b = (int(round(float(x) * 255)) for x in np.clip(c, 0, 1))
    return f"#{r:02x}{g:02x}{b:02x}"


def relative_luminance(hex_colour: str) -> float:
    """WCAG 2.1 relative luminance of an sRGB colour."""
    return float(np.dot([0.2126, 0.7152, 0.0722], _linear(_rgb(hex_colour))))


def contrast_ratio(a: str, b: str) -> float:
    """WCAG 2.1 contrast ratio of two colours (1 to 21)."""
    la, lb = sorted((relative_luminance(a), relative_luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)


def _mix(position: float) -> str:
    """The scale at ``position`` in [0, 1], interpolated in linear light between stops."""
    x = position * (len(STOPS) - 1)
    i = min(int(x), len(STOPS) - 2)
    t = x - i
    a, b = _linear(_rgb(STOPS[i])), _linear(_rgb(STOPS[i + 1]))
    return _encode((1 - t) * a + t * b)


@lru_cache(maxsize=32)
def tier_colours(n_tiers: int) -> tuple[TierColour, ...]:
    """Fill and text colour of each of ``n_tiers`` tiers, spread over the whole scale."""
    if n_tiers < 1:
        raise ValueError(f"n_tiers must be >= 1, got {n_tiers}")
    out = []
    for level in range(n_tiers):
        position = 0.0 if n_tiers == 1 else level / (n_tiers - 1)
        fill = _readable(position)
        text = INK if contrast_ratio(fill, INK) >= contrast_ratio(fill, WHITE) else WHITE
        out.append(TierColour(level=level, fill=fill, text=text))
    return tuple(out)


def _best_text_contrast(fill: str) -> float:
    return max(contrast_ratio(fill, INK), contrast_ratio(fill, WHITE))


def _readable(position: float, target: float = TEXT_CONTRAST) -> str:
    """The scale colour nearest ``position`` on which ink or white text reaches ``target``.

    Mid-lightness colours admit neither dark nor white text at 4.5:1; such a position is moved
    along the scale (towards whichever end is nearer in steps of 0.005) until one does.
    """
    for step in range(0, 201):
        for sign in ((1, -1) if position >= 0.5 else (-1, 1)):
            p = min(1.0, max(0.0, position + sign * step * 0.005))
            fill = _mix(p)
            if _best_text_contrast(fill) >= target:
                return fill
    raise ValueError(f"no readable colour near position {position}")
