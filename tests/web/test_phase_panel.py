"""The district page's panel on the phase of the current wave (``staff/_phase.html``)."""

from __future__ import annotations

import re

from fastapi.testclient import TestClient

from tests.web.conftest import login

PHASE_WORDS = ("growing", "slowing", "past its turning point", "declining")


def test_district_page_shows_the_phase_with_its_diagnostics(demo_app_client: TestClient) -> None:
    login(demo_app_client, "ada.analyst")
    text = demo_app_client.get("/staff/district/D01").text
    assert "Phase of the current wave" in text
    section = text[text.index('id="phase-h"'):text.index('id="rev-h"')]
    strong = re.search(r"is:</[^>]*>\s*<strong>([^<]+)</strong>|is: <strong>([^<]+)</strong>",
                       section)
    assert strong is not None and (strong.group(1) or strong.group(2)) in PHASE_WORDS
    for label in ("Share of the fitted final size reached", "Fitted turning day",
                  "Final size of the wave", "Change in the growth rate"):
        assert label in section
    if "at least" in section:  # before the turning point the warning goes with the lower bound
        assert "known to underestimate it" in section
    assert "<h3>District</h3>" in section
    assert re.search(r"<h3>Area [^<]+ \(all its districts\)</h3>", section)
    assert section.count("Share of the fitted final size reached") == 2


def test_district_page_phase_in_german(demo_app_client: TestClient) -> None:
    login(demo_app_client, "ada.analyst")
    text = demo_app_client.get("/staff/district/D01", params={"lang": "de"}).text
    assert "Phase der aktuellen Welle" in text
    assert "Erreichter Anteil der angepassten Endgröße" in text
    assert "<h3>Bezirk</h3>" in text
