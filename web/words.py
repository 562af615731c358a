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

    @property
    def public(self) -> str: ...

    @property
    def staff(self) -> str: ...

    def public_in(self, lang: str | None) -> str: ...

    def staff_in(self, lang: str | None) -> str: ...

    def name_in(self, lang: str | None) -> str: ...


class _Indicator(Protocol):
    @property
    def label(self) -> str: ...

    def label_in(self, lang: str | None) -> str: ...


class _Scenario(Protocol):
    @property
    def label(self) -> str: ...

    def label_in(self, lang: str | None) -> str: ...


class _Signal(Protocol):
    @property
    def message(self) -> str: ...

    def message_in(self, lang: str | None) -> str: ...


class _Policy(Protocol):  # rules.Ruleset (web does not import rules)
    @property
    def tiers(self) -> tuple[_Tier, ...]: ...

    @property
    def indicators(self) -> tuple[_Indicator, ...]: ...

    @property
    def scenarios(self) -> tuple[_Scenario, ...]: ...

    @property
    def prepare(self) -> tuple[_Signal, ...]: ...

    @property
    def description(self) -> str: ...

    def description_in(self, lang: str | None) -> str: ...

__all__ = ["MEASURES", "N_", "PATHOGENS", "PATTERNS", "UNITS", "WORDS", "measure_text",
           "policy_words", "translate_sentence"]


def N_(message: str) -> str:  # noqa: N802 - the gettext convention for "mark, do not translate"
    """Marks ``message`` for extraction and returns it unchanged."""
    return message


WORDS: tuple[str, ...] = (
    # feed states (server/services/feed_health.py: FeedStatus.health)
    N_("ok"), N_("attention"), N_("overdue"), N_("no delivery yet"),
    # what the engine did on a day (rules/record.py: action)
    N_("raised"), N_("lowered"), N_("decided"), N_("held"), N_("unchanged"),
    N_("insufficient"),
    # counter names of an explanation (server/readmodels/dossier.py)
    N_("Days the candidate was higher"), N_("Days the candidate was lower"),
    N_("Days since the last change"), N_("Candidate tier"),
    # a criterion's status (rules/explanation.py: _REASONS)
    N_("missing"), N_("stale"), N_("nowcast excluded"), N_("count below minimum"), N_("invalid"),
    N_("no baseline"),
    # feed kinds (feeds.yaml) and a feed without a schedule (server/services/feeds.py)
    N_("file"), N_("push"), N_("http"), N_("manual"),
    # roles (server/services/auth.py: ROLES)
    N_("viewer"), N_("analyst"), N_("approver"), N_("admin"),
    # a policy version's status (server/services/evaluation.py)
    N_("active"), N_("draft"), N_("retired"),
    # a backtest's state (server/services/backtest_jobs.py)
    N_("queued"), N_("running"), N_("done"), N_("failed"),
    # the timing rows and combination of the policy page (server/services/policies.py)
    N_("Days to confirm a rise"), N_("Days to confirm a fall"), N_("Minimum days in a tier"),
    N_("Most tiers down at once"), N_("Days until a decision takes effect"), N_("no limit"),
    N_("the highest criterion level"), N_("a weighted score of criterion levels"),
    # the public data dictionary (server/readmodels/public_data.py)
    N_("text"), N_("integer"), N_("number"), N_("true/false"), N_("date (ISO 8601)"),
    N_("date-time (ISO 8601, UTC)"),
    N_("District code used by the health office."), N_("District name."),
    N_("Area the district belongs to (may be empty)."),
    N_("Published alert tier, 0 the lowest; empty when none is published."),
    N_("Name of the tier in the policy."), N_("Day from which the tier is in force."),
    N_("When the health authority published the tier."), N_("District code."),
    N_("Day from which the new tier is in force."), N_("The new published tier."),
    N_("Name of the new tier."),
    N_("The published tier before the change; empty for the first one."),
    N_("When the change was published."),
    N_("Last day of the seven-day week (weeks end on the newest data day)."),
    N_("Confirmed cases in the week by test date; '<N' when fewer than N (suppressed to protect "
       "privacy); empty when a day is missing."),
    N_("Cases per 100 000 residents; empty when the count is suppressed."),
)


# Measures in the store have an English name, unit and description (the feed file's words). A
# page in another language names a measure by its base name (``cases`` of ``cases.influenza``)
# through the catalog, the pathogen in brackets; a measure the catalog does not know keeps the
# store's words. (label, description) per base name.
MEASURES: dict[str, tuple[str, str]] = {
    "cases": (N_("Confirmed cases"), N_("Confirmed cases by test date")),
    "tests": (N_("Tests performed"), N_("Tests performed by test date")),
    "positives": (N_("Positive tests"), N_("Positive tests by test date")),
    "hosp_admissions": (N_("Hospital admissions"),
                        N_("Hospital admissions with the infection by admission date")),
    "icu_occupied": (N_("Patients in intensive care"),
                     N_("Patients with the infection in intensive care at the daily census")),
    "icu_staffed": (N_("Staffed intensive-care beds"),
                    N_("Staffed adult intensive-care beds at the daily census")),
    "ww_concentration": (N_("Viral RNA in wastewater"),
                         N_("Viral RNA in 24-hour composite influent samples, per plant")),
    "ww_flow": (N_("Influent flow"),
                N_("Influent flow over the 24 hours of the sample, per plant")),
    "ww_marker": (N_("Faecal marker virus"),
                  N_("Faecal marker virus in the same sample, to normalise for dilution")),
    "gp_ari": (N_("GP consultations for acute respiratory illness"),
               N_("GP consultations for acute respiratory illness")),
}
PATHOGENS: dict[str, str] = {"influenza": N_("influenza"), "rsv": N_("RSV"),
                             "covid": N_("COVID-19")}
UNITS: dict[str, str] = {
    "cases": N_("cases"), "tests": N_("tests"), "admissions": N_("admissions"),
    "patients": N_("patients"), "beds": N_("beds"), "consultations": N_("consultations"),
    "gene copies/L": N_("gene copies/L"), "copies/L": N_("copies/L"), "m3/day": N_("m3/day"),
}


def measure_text(name: str, fallback: str, gettext: Callable[[str], str], lang: str,
                 *, which: int = 0) -> str:
    """Measure ``name``'s label (``which=0``) or description (1) in ``lang``: from the catalog
    by its base name, ``" (pathogen)"`` added; ``fallback`` (the store's words) in English or
    for a measure the catalog does not know."""
    base, _, pathogen = name.partition(".")
    if lang == "en" or base not in MEASURES:
        return fallback
    text = gettext(MEASURES[base][which])
    if pathogen:
        text += f" ({gettext(PATHOGENS.get(pathogen, pathogen))})"
    return text


# Fixed patterns of the engine's sentences (rules/explanation.py) and of the explanation's counter
# values (server/readmodels/dossier.py). The stored sentence is English; a German page rewrites the
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
    # the rest of the engine's phrases (rules/explanation.py: _describe, _held, explain)
    (r"Held at (?P<tier>[^:;]+?) \((?P<n>\d+)\):", N_("Held at %(tier)s (%(n)s):")),
    (r"(?P<k>\d+) of (?P<n>\d+) confirmation days so far for (?P<tier>[^:;()]+?) "
     r"\((?P<m>\d+)\)", N_("%(k)s of %(n)s confirmation days so far for %(tier)s (%(m)s)")),
    (r"(?P<k>\d+) of (?P<n>\d+) release days so far", N_("%(k)s of %(n)s release days so far")),
    (r"(?P<k>\d+) of (?P<n>\d+) minimum days in tier \((?P<r>\d+) of (?P<r2>\d+) release days "
     r"met\)", N_("%(k)s of %(n)s minimum days in tier (%(r)s of %(r2)s release days met)")),
    (rf"upper bound held above the exit threshold (?P<value>{_VALUE})",
     N_("upper bound held above the exit threshold %(value)s")),
    (rf"lower bound held below the exit threshold (?P<value>{_VALUE})",
     N_("lower bound held below the exit threshold %(value)s")),
    (rf"held above the exit threshold (?P<value>{_VALUE})",
     N_("held above the exit threshold %(value)s")),
    (rf"held below the exit threshold (?P<value>{_VALUE})",
     N_("held below the exit threshold %(value)s")),
    (rf"over the enter threshold (?P<value>{_VALUE}) for (?P<days>\d+) days",
     N_("over the enter threshold %(value)s for %(days)s days")),
    (rf"over the enter threshold (?P<value>{_VALUE})", N_("over the enter threshold %(value)s")),
    (rf"under the exit threshold (?P<value>{_VALUE})", N_("under the exit threshold %(value)s")),
    (rf"under the (?P<tier>[^:;()]+?) exit threshold (?P<value>{_VALUE}) for (?P<days>\d+) days",
     N_("under the %(tier)s exit threshold %(value)s for %(days)s days")),
    (rf"under the (?P<tier>[^:;()]+?) exit threshold (?P<value>{_VALUE})",
     N_("under the %(tier)s exit threshold %(value)s")),
    (rf"over the (?P<tier>[^:;()]+?) enter threshold (?P<value>{_VALUE}) for (?P<days>\d+) days",
     N_("over the %(tier)s enter threshold %(value)s for %(days)s days")),
    (rf"over the (?P<tier>[^:;()]+?) enter threshold (?P<value>{_VALUE})",
     N_("over the %(tier)s enter threshold %(value)s")),
    (r", at its top tier ", N_(", at its top tier ")),
    (rf"raise to (?P<tier>[^:;()]+? \(\d+\)) decided today, in force from (?P<day>{_DAY})",
     N_("raise to %(tier)s decided today, in force from %(day)s")),
    (rf"lowering to (?P<tier>[^:;()]+? \(\d+\)) decided today, in force from (?P<day>{_DAY})",
     N_("lowering to %(tier)s decided today, in force from %(day)s")),
    (rf"raise to (?P<tier>[^:;()]+? \(\d+\)) decided on (?P<k>{_DAY}), in force from "
     rf"(?P<day>{_DAY})", N_("raise to %(tier)s decided on %(k)s, in force from %(day)s")),
    (rf"lowering to (?P<tier>[^:;()]+? \(\d+\)) decided on (?P<k>{_DAY}), in force from "
     rf"(?P<day>{_DAY})", N_("lowering to %(tier)s decided on %(k)s, in force from %(day)s")),
    (rf"raise to (?P<tier>[^:;()]+? \(\d+\)) in force from (?P<day>{_DAY})",
     N_("raise to %(tier)s in force from %(day)s")),
    (rf"lowering to (?P<tier>[^:;()]+? \(\d+\)) in force from (?P<day>{_DAY})",
     N_("lowering to %(tier)s in force from %(day)s")),
    (r"candidate (?P<tier>[^:;()]+? \(\d+\))", N_("candidate %(tier)s")),
    (r"\(at most (?P<n>\d+) step\(s\) down at once; ", N_("(at most %(n)s step(s) down at once; ")),
    (rf"Insufficient data on (?P<day>{_DAY}):", N_("Insufficient data on %(day)s:")),
    (r" Unknown: ", N_(" Unknown: ")),
    (r" data (?P<days>[\d.]+) days old", N_(" data %(days)s days old")),
    (r" still incomplete \(nowcasts not used\)", N_(" still incomplete (nowcasts not used)")),
    (r" data invalid \(a stored value cannot be used\)",
     N_(" data invalid (a stored value cannot be used)")),
    (r" has no baseline yet \(not enough past seasons\)",
     N_(" has no baseline yet (not enough past seasons)")),
    (rf"lower bound under (?P<value>{_VALUE})", N_("lower bound under %(value)s")),
    (r"inactive \(count (?P<count>[\d.]+) under the minimum (?P<minimum>[\d.]+)\)",
     N_("inactive (count %(count)s under the minimum %(minimum)s)")),
    (rf"\(decided on (?P<day>{_DAY})\)", N_("(decided on %(day)s)")),
    (r"Nowcast: (?P<label>[^.;]+?) rests on a nowcast of (?P<n>\d+) incomplete days "
     r"\(the district's own reporting delays\)\.",
     N_("Nowcast: %(label)s rests on a nowcast of %(n)s incomplete days (the district's own "
        "reporting delays).")),
    (r"Nowcast: (?P<label>[^.;]+?) rests on a nowcast of (?P<n>\d+) incomplete days "
     r"\(reporting delays pooled over all districts\)\.",
     N_("Nowcast: %(label)s rests on a nowcast of %(n)s incomplete days (reporting delays "
        "pooled over all districts).")),
    (r"Nowcast: (?P<label>[^.;]+?) rests on a nowcast of (?P<n>\d+) incomplete days "
     r"\(reporting delays pooled over (?P<area>[^)]+)\)\.",
     N_("Nowcast: %(label)s rests on a nowcast of %(n)s incomplete days (reporting delays "
        "pooled over %(area)s).")),
    (r"\(reporting delays pooled over all districts\)",
     N_("(reporting delays pooled over all districts)")),
    (r"\(reporting delays pooled over (?P<area>[^)]+)\)",
     N_("(reporting delays pooled over %(area)s)")),
    (r"\(the district's own reporting delays\)", N_("(the district's own reporting delays)")),
    (r"^reporting delays pooled over all districts$",
     N_("reporting delays pooled over all districts")),
    (r"^reporting delays pooled over (?P<area>.+)$", N_("reporting delays pooled over %(area)s")),
    (r"^the district's own reporting delays$", N_("the district's own reporting delays")),
    # the nowcast accuracy line of the district page (server/services/nowcast_scores.py)
    (r"^nowcast of the last 7 days: median error (?P<error>[\d.]+) % \(unadjusted "
     r"(?P<unadjusted>[\d.]+) %\), 95 % interval covered (?P<coverage>\d+) % of "
     r"(?P<n>\d+) mornings$",
     N_("nowcast of the last 7 days: median error %(error)s %% (unadjusted %(unadjusted)s %%), "
        "95 %% interval covered %(coverage)s %% of %(n)s mornings")),
    (r"^nowcast of the last 7 days: no morning needed one$",
     N_("nowcast of the last 7 days: no morning needed one")),
    # changes since the previous day (server/readmodels/day_changes.py)
    (r"^recommended tier rose from (?P<old>.+?) to (?P<new>.+)$",
     N_("recommended tier rose from %(old)s to %(new)s")),
    (r"^recommended tier fell from (?P<old>.+?) to (?P<new>.+)$",
     N_("recommended tier fell from %(old)s to %(new)s")),
    (r"^prepare signal (?P<signal>\S+) fired$", N_("prepare signal %(signal)s fired")),
    (r"^official tier published: (?P<old>.+?) to (?P<new>.+)$",
     N_("official tier published: %(old)s to %(new)s")),
    (r"^official tier first published: (?P<new>.+)$",
     N_("official tier first published: %(new)s")),
    (r"^overridden to (?P<tier>[^(]+?) \((?P<n>\d+)\)", N_("overridden to %(tier)s (%(n)s)")),
    (r" \(recommended: ", N_(" (recommended: ")),
    (rf", in force from (?P<day>{_DAY}), not yet published: ",
     N_(", in force from %(day)s, not yet published: ")),
    (rf", in force from (?P<day>{_DAY}), published: ", N_(", in force from %(day)s, published: ")),
    # thresholds, notes and gates of the policy page (server/services/policies.py)
    (r"\(leave (?P<rest>[<>] [^)]+)\)", N_("(leave %(rest)s)")),
    (r"^inactive below (?P<n>[\d.]+) events$", N_("inactive below %(n)s events")),
    (r"^while (?P<source>\S+) is at tier (?P<n>\d+) or above$",
     N_("while %(source)s is at tier %(n)s or above")),
    (r"^override (?P<id>[\w-]+)$", N_("override %(id)s")),
    (r"^the highest tier at least (?P<m>\d+) criteria reach$",
     N_("the highest tier at least %(m)s criteria reach")),
    (r"^(?P<head>[\w-]+: .+?) at least (?P<value>[\d.]+)$", N_("%(head)s at least %(value)s")),
    (r"^(?P<head>[\w-]+: .+?) at most (?P<value>[\d.]+)$", N_("%(head)s at most %(value)s")),
    (r"^(?P<head>[\w-]+: .+?) must be known$", N_("%(head)s must be known")),
    # the public data dictionary's provisional flag (server/readmodels/public_data.py)
    (r"^True while the week still contains days whose late reports are arriving \(the last "
     r"(?P<days>\d+) days\): it will rise\.$",
     N_("True while the week still contains days whose late reports are arriving (the last "
        "%(days)s days): it will rise.")),
    # a feed's schedule (server/services/feeds.py: _schedule_text)
    (r"^every (?P<span>\d+ (?:d|h|min|s)) \((?P<zone>[^)]+)\)$", N_("every %(span)s (%(zone)s)")),
    # a tier change on the effects page (server/services/event_effects.py)
    (r"^tier (?P<old>\S+) -> (?P<new>\d+) \(confirmed\): ",
     N_("tier %(old)s → %(new)s (confirmed): ")),
    (r"^tier (?P<old>\S+) -> (?P<new>\d+) \(overridden\): ",
     N_("tier %(old)s → %(new)s (overridden): ")),
    (r"^tier (?P<old>\S+) -> (?P<new>\d+) \(recorded\): ",
     N_("tier %(old)s → %(new)s (recorded): ")),
    # the commonest reasons a feed row is rejected (server/feeds/validation.py), on the receipt
    (r"^value (?P<value>'.*') is not a number$", N_("value %(value)s is not a number")),
    (r"^unknown region code (?P<code>'.*')$", N_("unknown region code %(code)s")),
    (r"^date (?P<value>'.*') is not a date \((?P<expect>[^)]*)\)$",
     N_("date %(value)s is not a date (%(expect)s)")),
    (r"^date (?P<value>'.*') is in the future$", N_("date %(value)s is in the future")),
    (r"^value (?P<value>'.*') is outside the plausible range (?P<range>\[[^\]]*\])$",
     N_("value %(value)s is outside the plausible range %(range)s")),
    (r"^measure (?P<measure>'.*') is not carried by feed (?P<feed>'.*')$",
     N_("measure %(measure)s is not carried by feed %(feed)s")),
    (r"^a count cannot be negative: (?P<value>.*)$", N_("a count cannot be negative: %(value)s")),
    (r"^a count must be a whole number: (?P<value>.*)$",
     N_("a count must be a whole number: %(value)s")),
    (rf"(?<=[\d%] )under (?P<value>{_VALUE})", N_("under %(value)s")),
    (rf"(?<=[\d%] )over (?P<value>{_VALUE})", N_("over %(value)s")),
    (r"per 100[ \u202f\u00a0]000", N_("per 100 000")),
    (r"^(?P<k>\d+) of (?P<n>\d+)$", N_("%(k)s of %(n)s")),
    (r"^(?P<days>\d+) \(minimum (?P<minimum>\d+)\)$", N_("%(days)s (minimum %(minimum)s)")),
    (r"Prepare:", N_("Prepare:")),
    (rf"Testing: tests rose (?P<pct>\d+)% from (?P<day>{_DAY}): part of the rise in cases "
     r"reflects more testing\.",
     N_("Testing: tests rose %(pct)s%% from %(day)s: part of the rise in cases reflects more "
        "testing.")),
    (rf"Testing: tests fell (?P<pct>\d+)% from (?P<day>{_DAY}): part of the fall in cases "
     r"reflects less testing\.",
     N_("Testing: tests fell %(pct)s%% from %(day)s: part of the fall in cases reflects less "
        "testing.")),
    (r"held back by testing change", N_("held back by testing change")),
)
_COMPILED = tuple((re.compile(p), m) for p, m in PATTERNS)
_NUMBER = re.compile(r"(?<=\d)\.(?=\d)")
_ISO_DAY = re.compile(r"\b(\d{4})-(\d{2})-(\d{2})\b")


def policy_words(ruleset: _Policy | None, lang: str) -> dict[str, str]:
    """The active policy's tier names, indicator labels, scenario labels and prepare-signal
    messages in ``lang`` (their ``translations``), keyed by the policy's own text; empty for
    English or a policy without translations. A message may hold ``{reading}`` (the indicator's
    value, filled in by the engine): :func:`translate_sentence` matches it as a placeholder."""
    if ruleset is None or lang == "en":
        return {}
    words = {t.name: t.name_in(lang) for t in ruleset.tiers}
    for t in ruleset.tiers:  # the policy page's staff guidance and public text
        words[t.public.strip()] = t.public_in(lang).strip()
        words[t.staff.strip()] = t.staff_in(lang).strip()
    words.update({i.label: i.label_in(lang) for i in ruleset.indicators})
    words.update({s.label: s.label_in(lang) for s in ruleset.scenarios})
    words.update({s.message: s.message_in(lang) for s in ruleset.prepare if s.message})
    words[ruleset.description.strip()] = ruleset.description_in(lang).strip()
    return {k: v for k, v in words.items() if k and v and k != v}


def _filler(template: str) -> Callable[[re.Match[str]], str]:
    def fill(m: re.Match[str]) -> str:
        return template % m.groupdict()
    return fill


def translate_sentence(text: str, gettext: Callable[[str], str], lang: str,
                       words: dict[str, str] | None = None, *, numbers: bool = True) -> str:
    """``text`` (an engine sentence or counter value) with its fixed English patterns in ``lang``.

    English and an empty text come back unchanged; in German decimal points between digits
    become commas and ISO days ``dd.mm.yyyy`` (the form of the ``day`` filter), unless
    ``numbers`` is false (a rejected row's values as sent). ``words`` (from
    :func:`policy_words`) replaces the policy's tier names and labels, longest first."""
    if lang == "en" or not text:
        return text
    for pattern, message in _COMPILED:
        translated = gettext(message)
        if translated == message:
            continue
        text = pattern.sub(_filler(translated), text)
    if lang == "de" and numbers:  # not in values quoted as sent (a rejected row)
        text = _NUMBER.sub(",", text)
        text = _ISO_DAY.sub(r"\3.\2.\1", text)
    if words:
        for name in [n for n in words if "{reading}" in n]:
            before, _, after = name.partition("{reading}")
            rx_msg = re.compile(re.escape(before) + r"(?P<reading>.+?)" + re.escape(after))
            german = words[name]
            text = rx_msg.sub(lambda m, g=german: g.replace("{reading}", m.group("reading")), text)
        names = sorted(words, key=len, reverse=True)
        rx = re.compile(r"(?<![\w-])(?:" + "|".join(re.escape(n) for n in names) + r")(?![\w-])")
        table = words

        def swap(m: re.Match[str]) -> str:
            return table[m.group(0)]

        text = rx.sub(swap, text)
    return text
