"""Shared text for the rules tests."""

from __future__ import annotations

#: Three invented tiers: the head of the small rulesets in test_levels.py and test_signals.py.
THREE_TIERS = """\
tiers:
  - {name: Calm, staff: s, public: p}
  - {name: Busy, staff: s, public: p}
  - {name: Hectic, staff: s, public: p}
"""
