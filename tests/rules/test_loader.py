"""Parser tests: each error names file:line:col and key path; fuzzing raises only RulesetError."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

from rules import RulesetError, load_ruleset, parse_ruleset, summary

POLICIES = Path(__file__).resolve().parents[2] / "rules" / "policies"

BASE = """\
name: demo
version: "1"
tiers:
  - {name: Calm, staff: s0, public: p0}
  - {name: Busy, staff: s1, public: p1}
  - {name: Hectic, staff: s2, public: p2}
indicators:
  incidence_7d: {label: incidence}
  positivity_7d: {label: positivity, unit: "%"}
criteria:
  - id: incidence
    indicator: incidence_7d
    enter: [50, 150]
    exit: [40, 120]
  - id: positivity
    indicator: positivity_7d
    enter: [5, 10]
"""


@pytest.mark.parametrize("name", sorted(p.name for p in POLICIES.glob("*.yaml")))
def test_load_ruleset_shipped_policy_parses(name: str) -> None:
    rs = load_ruleset(POLICIES / name)
    assert rs.source.endswith(name)
    assert len(rs.sha256) == 64


def test_parse_ruleset_identity_is_sha256_of_text() -> None:
    import hashlib

    rs = parse_ruleset(BASE)
    assert rs.sha256 == hashlib.sha256(BASE.encode()).hexdigest()  # FIPS 180-4 via hashlib
    assert (rs.name, rs.version, rs.text) == ("demo", "1", BASE)


@pytest.mark.parametrize(
    ("old", "new", "where"),
    [
        pytest.param(
            "    exit: [40, 120]",
            "    exit: [40, 160]",
            r"^f\.yaml:13:17: criteria\[0\]\.enter\[1\]: 150 is below the exit "
            r"threshold 160$",
            id="enter-below-exit",
        ),
        pytest.param(
            "    enter: [5, 10]",
            "    enter: [5, 10]\n    colour: red",
            r"^f\.yaml:18:5: criteria\[1\]\.colour: unknown key 'colour'",
            id="unknown-key",
        ),
        pytest.param(
            "    enter: [5, 10]",
            "    enter: [5, ten]",
            r"^f\.yaml:17:16: criteria\[1\]\.enter\[1\]: expected a number, got 'ten'",
            id="wrong-type",
        ),
        pytest.param(
            "    enter: [5, 10]",
            "    enter: [5]",
            r"^f\.yaml:17:12: criteria\[1\]\.enter: has 1 thresholds, expected 2",
            id="wrong-length",
        ),
        pytest.param(
            "    indicator: positivity_7d",
            "    indicator: positivity_14d",
            r"^f\.yaml:16:16: criteria\[1\]\.indicator: 'positivity_14d' is not a "
            r"declared indicator",
            id="undeclared-indicator",
        ),
        pytest.param(
            'version: "1"\n', "", r"^f\.yaml:1:1: missing required key 'version'", id="missing-key"
        ),
        pytest.param(
            "    enter: [5, 10]",
            "    enter: [5, 4]",
            r"^f\.yaml:17:16: criteria\[1\]\.enter\[1\]: 4 is below the tier-1 enter "
            r"threshold 5",
            id="not-monotone",
        ),
        pytest.param(
            "  - id: positivity",
            "  - id: incidence",
            r"^f\.yaml:15:9: criteria\[1\]\.id: id 'incidence' is used twice",
            id="duplicate-id",
        ),
        pytest.param(
            "name: demo",
            "name: demo\nname: again",
            r"^f\.yaml:2:1: name: duplicate key 'name'",
            id="duplicate-key",
        ),
        pytest.param(
            "    enter: [5, 10]",
            "    enter: [5, 10]\n    direction: upward",
            r"^f\.yaml:18:16: criteria\[1\]\.direction: expected one of rising, falling",
            id="bad-choice",
        ),
    ],
)
def test_parse_ruleset_error_names_file_line_column_and_path(
    old: str, new: str, where: str
) -> None:
    assert old in BASE
    with pytest.raises(RulesetError, match=where):
        parse_ruleset(BASE.replace(old, new, 1), source="f.yaml")


def test_parse_ruleset_error_carries_fields() -> None:
    with pytest.raises(RulesetError) as info:
        parse_ruleset(BASE.replace("exit: [40, 120]", "exit: [40, 160]"), source="f.yaml")
    err = info.value
    assert (err.file, err.line, err.column, err.path) == ("f.yaml", 13, 17, "criteria[0].enter[1]")


def test_parse_ruleset_collects_several_errors() -> None:
    text = BASE.replace("    enter: [5, 10]", "    enter: [5, 10]\n    colour: red").replace(
        "  incidence_7d: {label: incidence}", "  incidence_7d: {label: incidence, decimals: -1}"
    )
    with pytest.raises(RulesetError, match=r"\(1 more problem\)") as info:
        parse_ruleset(text, source="f.yaml")
    paths = [e.path for e in info.value.errors]
    assert paths == ["indicators.incidence_7d.decimals", "criteria[1].colour"]


def test_parse_ruleset_invalid_yaml_has_position() -> None:
    with pytest.raises(RulesetError, match=r"^f\.yaml:\d+:\d+: invalid YAML"):
        parse_ruleset("name: [unclosed\n", source="f.yaml")


def test_parse_ruleset_python_tag_is_refused_not_run() -> None:
    text = BASE.replace('version: "1"', "version: !!python/object/apply:os.getcwd []")
    with pytest.raises(RulesetError, match=r"^f\.yaml:2:10: version"):
        parse_ruleset(text, source="f.yaml")


def test_load_ruleset_missing_file_names_it() -> None:
    with pytest.raises(RulesetError, match=r"^nowhere\.yaml:0:0: cannot read the file"):
        load_ruleset("nowhere.yaml")


def test_summary_lists_tiers_and_thresholds() -> None:
    text = summary(parse_ruleset(BASE))
    assert "2  Hectic: s2" in text
    assert re.search(r"incidence\s+incidence_7d\s+estimate\s+>=50 \(exit <40\)\s+>=150", text)


_scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-5, 500),
    st.floats(allow_nan=True),
    st.sampled_from(["rising", "falling", "bounds", "x", "incidence_7d", "highest"]),
)
_keys = st.sampled_from(
    [
        "name",
        "version",
        "tiers",
        "indicators",
        "criteria",
        "enter",
        "exit",
        "id",
        "indicator",
        "label",
        "timing",
        "confirm_days",
        "gates",
        "prepare",
        "combination",
        "method",
        "zzz",
    ]
)
_docs = st.recursive(
    _scalars,
    lambda kids: st.lists(kids, max_size=4) | st.dictionaries(_keys, kids, max_size=5),
    max_leaves=25,
)


@settings(max_examples=150, deadline=None)
@given(_docs)
def test_parse_ruleset_fuzz_structured_only_raises_ruleset_error(doc: object) -> None:
    text = yaml.safe_dump(doc)
    try:
        parse_ruleset(text, source="fuzz.yaml")
    except RulesetError as exc:
        assert str(exc).startswith("fuzz.yaml:")


@settings(max_examples=150, deadline=None)
@given(st.text(max_size=200))
def test_parse_ruleset_fuzz_text_only_raises_ruleset_error(text: str) -> None:
    try:
        parse_ruleset(text, source="fuzz.yaml")
    except RulesetError as exc:
        assert str(exc).startswith("fuzz.yaml:")


@settings(max_examples=100, deadline=None)
@given(st.integers(0, len(BASE) - 1), st.sampled_from(["", ":", "-", "[", "{", "\n  ", "null"]))
def test_parse_ruleset_fuzz_mutations_only_raise_ruleset_error(pos: int, insert: str) -> None:
    try:
        parse_ruleset(BASE[:pos] + insert + BASE[pos:], source="fuzz.yaml")
    except RulesetError as exc:
        assert str(exc).startswith("fuzz.yaml:")


def test_tier_translations_are_read_and_fall_back_to_the_default() -> None:
    text = BASE.replace(
        "  - {name: Busy, staff: s1, public: p1}\n",
        "  - name: Busy\n    staff: s1\n    public: p1\n    translations:\n"
        "      de: {name: Betrieb, public: Mehr los}\n      fr-CH: {name: Occupé}\n",
    )
    busy = parse_ruleset(text).tiers[1]
    assert (busy.name_in("de"), busy.public_in("de")) == ("Betrieb", "Mehr los")
    assert (busy.name_in("fr-CH"), busy.public_in("fr-CH")) == ("Occupé", "p1")  # no public text
    assert (busy.name_in("it"), busy.name_in(None), busy.public_in("it")) == ("Busy", "Busy", "p1")


def test_tier_staff_guidance_translation_falls_back_to_the_default() -> None:
    text = BASE.replace(
        "  - {name: Busy, staff: s1, public: p1}\n",
        "  - name: Busy\n    staff: s1\n    public: p1\n    translations:\n"
        "      de: {name: Betrieb, staff: Dienst}\n      fr-CH: {name: Occupé}\n",
    )
    busy = parse_ruleset(text).tiers[1]
    assert (busy.staff_in("de"), busy.staff_in("fr-CH"), busy.staff_in(None)) == (
        "Dienst", "s1", "s1")


@pytest.mark.parametrize(
    ("translations", "where"),
    [
        ("      German: {name: Betrieb}\n",
         r"f\.yaml:9:\d+: tiers\[1\]\.translations\.German: 'German' is not a language code"),
        ("      de: {name: Betrieb, colour: x}\n",
         r"f\.yaml:9:\d+: tiers\[1\]\.translations\.de\.colour: unknown key 'colour'"),
        ("      de: {public: x}\n",
         r"f\.yaml:9:\d+: tiers\[1\]\.translations\.de: missing required key 'name'"),
    ],
)
def test_tier_translation_errors_are_located(translations: str, where: str) -> None:
    text = BASE.replace(
        "  - {name: Busy, staff: s1, public: p1}\n",
        "  - name: Busy\n    staff: s1\n    public: p1\n    translations:\n" + translations,
    )
    with pytest.raises(RulesetError) as info:
        parse_ruleset(text, source="f.yaml")
    assert any(re.search(where, p.location()) for p in info.value.errors), info.value.errors


def test_indicator_label_translations_are_read_and_fall_back_to_the_label() -> None:
    text = BASE.replace("  incidence_7d: {label: incidence}\n",
                        "  incidence_7d: {label: incidence, translations: {de: Inzidenz}}\n")
    spec = next(i for i in parse_ruleset(text).indicators if i.name == "incidence_7d")
    assert (spec.label_in("de"), spec.label_in("fr"), spec.label_in(None)) == (
        "Inzidenz", "incidence", "incidence")


@pytest.mark.parametrize(("translations", "where"), [
    ("{German: Inzidenz}", r"f\.yaml:\d+:\d+: indicators\.incidence_7d\.translations\.German: "
                           r"'German' is not a language code"),
    ("{de: ''}", r"f\.yaml:\d+:\d+: indicators\.incidence_7d\.translations\.de: "),
])
def test_indicator_translation_errors_are_located(translations: str, where: str) -> None:
    text = BASE.replace("  incidence_7d: {label: incidence}\n",
                        f"  incidence_7d: {{label: incidence, translations: {translations}}}\n")
    with pytest.raises(RulesetError) as info:
        parse_ruleset(text, source="f.yaml")
    assert any(re.search(where, p.location()) for p in info.value.errors), info.value.errors


@pytest.mark.parametrize(("level", "expected"), [
    (None, "districts"), ("districts", "districts"), ("areas", "areas"), ("county", "county"),
])
def test_policy_level_is_read_with_districts_by_default(level: str | None, expected: str) -> None:
    text = BASE if level is None else BASE.replace("version: \"1\"\n",
                                                   f"version: \"1\"\nlevel: {level}\n")
    assert parse_ruleset(text).level == expected


@pytest.mark.parametrize(("value", "where"), [
    ("regions", r"^f\.yaml:3:8: level: expected one of districts, areas, county, got 'regions'"),
    ("[areas]", r"^f\.yaml:3:8: level: "),
    ("", r"^f\.yaml:3:\d+: level: "),
])
def test_policy_level_errors_name_line_and_key(value: str, where: str) -> None:
    text = BASE.replace("version: \"1\"\n", f"version: \"1\"\nlevel: {value}\n")
    with pytest.raises(RulesetError, match=where):
        parse_ruleset(text, source="f.yaml")


def test_policy_level_is_checked_on_the_model_too() -> None:
    from dataclasses import replace

    from rules import FieldError

    rs = parse_ruleset(BASE)
    with pytest.raises(FieldError, match="level"):
        replace(rs, level="wards")
