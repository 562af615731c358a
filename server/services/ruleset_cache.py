"""The one cache of parsed rulesets: a stored ruleset's YAML is parsed once per text (SHA-256).

Every service that needs the :class:`rules.Ruleset` of a stored row asks :func:`parsed`; drafts
that are not stored yet are parsed directly (they are checked once and their errors name the
uploaded file).
"""

from __future__ import annotations

from functools import lru_cache

from rules import Ruleset, parse_ruleset
from server.store.models import Ruleset as RulesetRow

# Rulesets are small (tens of kilobytes parsed); an office keeps a few dozen versions.
CACHED_VERSIONS = 64


@lru_cache(maxsize=CACHED_VERSIONS)
def _parse(sha256: str, text: str, source: str) -> Ruleset:
    return parse_ruleset(text, source=source)


def parsed(row: RulesetRow) -> Ruleset:
    """The parsed ruleset of a stored row (parsed once per text, by SHA-256)."""
    return _parse(row.sha256, row.yaml_text, f"{row.name}-{row.version}.yaml")
