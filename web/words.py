"""Words built in Python that reach the pages: marked here for the message catalogs.

Services (``server/services``) and the rules engine return a few fixed English words as data:
feed states, the engine's action words, the counter names of an explanation. They stay English
in the services (they are also API values and stored text); templates translate them at render
time with the ``word`` filter, which looks the text up in the catalog of the page's language and
keeps any text the catalog does not know (a name, a code). ``pybabel extract`` finds the
messages below through :func:`N_`.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from typing import Protocol


class _Tier(Protocol):
    @property
    def name(self) -> str: ...

    def name_in(self, lang: str | None) -> str: ...


class _Indicator(Protocol):
    @property
    def label(self) -> str: ...

    def label_in(self, lang: str | None) -> str: ...


class _Policy(Protocol):  # rules.Ruleset (web does not import rules)
    @property
    def tiers(self) -> tuple[_Tier, ...]: ...

    @property
    def indicators(self) -> tuple[_Indicator, ...]: ...

__all__ = ["N_", "PATTERNS", "WORDS", "policy_words", "translate_sentence"]


def N_(message: str) -> str:  # noqa: N802 - the gettext convention for "mark, do not translate"
    """Marks ``message`` for extraction and returns it unchanged."""
    return message


WORDS: tuple[str, ...] = (
    # feed states (server/services/feed_health.py: FeedStatus.health)
    N_("ok"), N_("attention"), N_("overdue"), N_("no delivery yet"),
    # what the engine did on a day (rules/record.py: action)
    N_("raised"), N_("lowered"), N_("decided"), N_("held"), N_("unchanged"),
    N_("insufficient"),
    # counter names of an explanation (server/services/dossier.py)
    N_("Days the candidate was higher"), N_("Days the candidate was lower"),
    N_("Days since the last change"), N_("Candidate tier"),
    # a criterion's status (rules/explanation.py: _REASONS)
    N_("missing"), N_("stale"), N_("nowcast excluded"), N_("count below minimum"), N_("invalid"),
    N_("no baseline"),
    # feed kinds (feeds.yaml)
    N_("file"), N_("push"),
)


# Fixed patterns of the engine's sentences (rules/explanation.py) and of the explanation's counter
# values (server/services/dossier.py). The stored sentence is English; a German page rewrites the
# patterns below through the catalog, in this order (longer patterns first), and writes the
# numbers and dates inside with the language's decimal sign and date form. Names the policy gives
# (tiers, indicator labels, signal texts) stay as the policy writes them.
_DAY = r"\d{4}-\d{2}-\d{2}"
_VALUE = r"[\d.]+%?"
PATTERNS: tuple[tuple[str, str], ...] = (
    (rf"Raised from (?P<old>[^:;]+?) \((?P<old_n>\d+)\) to (?P<new>[^:;]+?) \((?P<new_n>\d+)\) "
     rf"on (?P<day>{_DAY}):",
     N_("Raised from %(old)s (%(old_n)s) to %(new)s (%(new_n)s) on %(day)s:")),
    (rf"Lowered from (?P<old>[^:;]+?) \((?P<old_n>\d+)\) to (?P<new>[^:;]+?) \((?P<new_n>\d+)\) "
     rf"on (?P<day>{_DAY}):",
     N_("Lowered from %(old)s (%(old_n)s) to %(new)s (%(new_n)s) on %(day)s:")),
    (r"Stays at (?P<tier>[^:;]+?) \((?P<n>\d+)\):", N_("Stays at %(tier)s (%(n)s):")),
    (rf"upper bound under the exit threshold (?P<value>{_VALUE}) for (?P<days>\d+) days",
     N_("upper bound under the exit threshold %(value)s for %(days)s days")),
    (rf"under the exit threshold (?P<value>{_VALUE}) for (?P<days>\d+) days",
     N_("under the exit threshold %(value)s for %(days)s days")),
    (rf"over the enter threshold (?P<value>{_VALUE}) for (?P<k>\d+) of (?P<n>\d+) days",
     N_("over the enter threshold %(value)s for %(k)s of %(n)s days")),
    (rf"lower bound under (?P<value>{_VALUE})", N_("lower bound under %(value)s")),
    (r"inactive \(count (?P<count>\d+) under the minimum (?P<minimum>\d+)\)",
     N_("inactive (count %(count)s under the minimum %(minimum)s)")),
    (rf"\(decided on (?P<day>{_DAY})\)", N_("(decided on %(day)s)")),
    (r"Nowcast: (?P<label>[^.;]+?) rests on a nowcast of (?P<n>\d+) incomplete days "
     r"\(the district's own reporting delays\)\.",
     N_("Nowcast: %(label)s rests on a nowcast of %(n)s incomplete days (the district's own "
        "reporting delays).")),
    (rf"(?<=[\d%] )under (?P<value>{_VALUE})", N_("under %(value)s")),
    (rf"(?<=[\d%] )over (?P<value>{_VALUE})", N_("over %(value)s")),
    (r"per 100 000", N_("per 100 000")),
    (r"^(?P<k>\d+) of (?P<n>\d+)$", N_("%(k)s of %(n)s")),
    (r"^(?P<days>\d+) \(minimum (?P<minimum>\d+)\)$", N_("%(days)s (minimum %(minimum)s)")),
    (r"Prepare:", N_("Prepare:")),
)
_COMPILED = tuple((re.compile(p), m) for p, m in PATTERNS)
_NUMBER = re.compile(r"(?<=\d)\.(?=\d)")
_ISO_DAY = re.compile(r"\b(\d{4})-(\d{2})-(\d{2})\b")


def policy_words(ruleset: _Policy | None, lang: str) -> dict[str, str]:
    """The active policy's tier names and indicator labels in ``lang`` (its ``translations``),
    keyed by the policy's own text; empty for English or a policy without translations."""
    if ruleset is None or lang == "en":
        return {}
    words = {t.name: t.name_in(lang) for t in ruleset.tiers}
    words.update({i.label: i.label_in(lang) for i in ruleset.indicators})
    return {k: v for k, v in words.items() if k != v}


def _filler(template: str) -> Callable[[re.Match[str]], str]:
    def fill(m: re.Match[str]) -> str:
        return template % m.groupdict()
    return fill


def translate_sentence(text: str, gettext: Callable[[str], str], lang: str,
                       words: dict[str, str] | None = None) -> str:
    """``text`` (an engine sentence or counter value) with its fixed English patterns in ``lang``.

    English and an empty text come back unchanged; in German decimal points between digits
    become commas and ISO days ``dd.mm.yyyy`` (the form of the ``day`` filter). ``words`` (from
    :func:`policy_words`) replaces the policy's tier names and labels, longest first."""
    if lang == "en" or not text:
        return text
    for pattern, message in _COMPILED:
        translated = gettext(message)
        if translated == message:
            continue
        text = pattern.sub(_filler(translated), text)
    if lang == "de":
        text = _NUMBER.sub(",", text)
        text = _ISO_DAY.sub(r"\3.\2.\1", text)
    if words:
        names = sorted(words, key=len, reverse=True)
        rx = re.compile(r"(?<!\w)(?:" + "|".join(re.escape(n) for n in names) + r")(?!\w)")
        table = words

        def swap(m: re.Match[str]) -> str:
            return table[m.group(0)]

        text = rx.sub(swap, text)
    return text
