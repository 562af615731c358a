"""Message catalogs (Babel/gettext) for the web pages: English and German.

The catalogs ship as ``.po`` text under ``web/i18n/<lang>/LC_MESSAGES/messages.po`` and are
compiled in memory when the app starts (:func:`load_catalogs`), so no build step is needed and
no compiled ``.mo`` file is kept in the repository. The language of a request comes from
``?lang=``, then the ``tw_lang`` cookie, then ``Accept-Language``; English is the fallback and the
source language (a missing translation shows the English text).
"""

from __future__ import annotations

import gettext
import io
from contextvars import ContextVar
from dataclasses import dataclass
from pathlib import Path

from babel.messages.mofile import write_mo
from babel.messages.pofile import read_po

__all__ = ["LANGUAGES", "Catalogs", "choose_language", "current_language", "load_catalogs"]

HERE = Path(__file__).parent
LANGUAGES: tuple[str, ...] = ("en", "de")
LANGUAGE_NAMES = {"en": "English", "de": "Deutsch"}
current_language: ContextVar[str] = ContextVar("tierwise_language", default="en")


@dataclass(frozen=True)
class Catalogs:
    """Compiled translations by language code."""

    translations: dict[str, gettext.NullTranslations]

    def gettext(self, message: str) -> str:
        return self.translations[current_language.get()].gettext(message)

    def ngettext(self, singular: str, plural: str, n: int) -> str:
        return self.translations[current_language.get()].ngettext(singular, plural, n)


def _compile(path: Path) -> gettext.NullTranslations:
    with path.open("rb") as fh:
        catalog = read_po(fh)
    buffer = io.BytesIO()
    write_mo(buffer, catalog)
    buffer.seek(0)
    return gettext.GNUTranslations(buffer)


def load_catalogs(folder: Path = HERE) -> Catalogs:
    """Compile every shipped ``.po`` catalog; English falls back to the source strings."""
    out: dict[str, gettext.NullTranslations] = {}
    for lang in LANGUAGES:
        po = folder / lang / "LC_MESSAGES" / "messages.po"
        out[lang] = _compile(po) if po.exists() else gettext.NullTranslations()
    return Catalogs(translations=out)


def choose_language(query: str | None, cookie: str | None, accept: str | None) -> str:
    """The first supported language of ``?lang=``, the cookie, then ``Accept-Language``."""
    for candidate in (query, cookie):
        if candidate and candidate in LANGUAGES:
            return candidate
    if accept:
        ranked = []
        for part in accept.split(","):
            tag, _, q = part.strip().partition(";q=")
            try:
                weight = float(q) if q else 1.0
            except ValueError:
                weight = 0.0
            ranked.append((weight, tag.split("-")[0].lower()))
        for _weight, tag in sorted(ranked, key=lambda x: -x[0]):
            if tag in LANGUAGES:
                return tag
    return "en"
