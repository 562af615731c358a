"""The engine's testing-change sentences on a German page, through the German catalog."""

from __future__ import annotations

from pathlib import Path

from babel.messages.pofile import read_po

from web.words import translate_sentence

PO = Path(__file__).resolve().parents[2] / "web/i18n/de/LC_MESSAGES/messages.po"


def _german() -> dict[str, str]:
    with PO.open("rb") as f:
        catalog = read_po(f, locale="de")
    return {m.id: m.string for m in catalog if isinstance(m.id, str) and m.string}


def test_testing_sentences_in_german() -> None:
    german = _german()
    sentence = ("Held at Baseline (0): held back by testing change (7-day incidence 90 per "
                "100 000 over the enter threshold 75). Testing: tests rose 60% from 2026-03-02: "
                "part of the rise in cases reflects more testing.")
    out = translate_sentence(sentence, lambda m: german.get(m, m), "de")
    assert "zurückgehalten wegen geänderter Testpraxis" in out
    assert out.endswith("Testen: seit 02.03.2026 60 % mehr Tests: ein Teil des Anstiegs der "
                        "Fälle geht auf mehr Tests zurück.")
    fell = ("Stays at Baseline (0). Testing: tests fell 30% from 2026-03-02: part of the fall in "
            "cases reflects less testing.")
    assert translate_sentence(fell, lambda m: german.get(m, m), "de").endswith(
        "Testen: seit 02.03.2026 30 % weniger Tests: ein Teil des Rückgangs der Fälle geht auf "
        "weniger Tests zurück.")
    assert translate_sentence(sentence, lambda m: german.get(m, m), "en") == sentence
