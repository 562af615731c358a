"""Typed reading of composed YAML nodes with located errors (rules/nodes.py)."""

from __future__ import annotations

import pytest
import yaml

from rules.errors import FieldError
from rules.nodes import MISSING, NodeReader


def _node(text: str) -> yaml.Node:
    node = yaml.compose(text, Loader=yaml.SafeLoader)
    assert node is not None
    return node


def _errors(reader: NodeReader) -> list[str]:
    return [e.location() for e in reader.errors]


def test_mapping_reads_known_keys() -> None:
    r = NodeReader("f.yaml")
    out = r.mapping(_node("a: 1\nb: 2\n"), (), required=("a",), optional=("b",))
    assert out is not None and sorted(out) == ["a", "b"]
    assert r.errors == []


def test_mapping_unknown_duplicate_and_missing_keys_are_located() -> None:
    r = NodeReader("f.yaml")
    r.mapping(_node("a: 1\na: 2\nzz: 3\n"), ("criteria", 0), required=("a", "b"))
    assert _errors(r) == [
        "f.yaml:2:1: criteria[0].a: duplicate key 'a'",
        "f.yaml:3:1: criteria[0].zz: unknown key 'zz' (expected one of: a, b)",
        "f.yaml:1:1: criteria[0]: missing required key 'b'",
    ]


def test_mapping_free_keys_accepts_any_plain_key_but_not_a_number_key() -> None:
    r = NodeReader("f.yaml")
    out = r.mapping(_node("x: 1\n2: 3\n"), ("params",), free_keys=True)
    assert out is not None and list(out) == ["x"]
    assert _errors(r) == ["f.yaml:2:1: params: keys must be plain text, got the value '2'"]


def test_mapping_of_a_list_is_an_error() -> None:
    r = NodeReader("f.yaml")
    assert r.mapping(_node("- 1\n"), ("timing",)) is None
    assert _errors(r) == ["f.yaml:1:1: timing: expected a mapping, got a list"]


@pytest.mark.parametrize(
    ("text", "method", "kwargs", "value", "error"),
    [
        pytest.param("7", "integer", {}, 7, None, id="integer"),
        pytest.param("0", "integer", {"minimum": 1}, None,
                     "expected an integer >= 1, got 0", id="integer-minimum"),
        pytest.param("true", "integer", {}, None, "expected an integer, got True",
                     id="bool-is-not-an-integer"),
        pytest.param("2.5", "number", {}, 2.5, None, id="number"),
        pytest.param("null", "number", {"nullable": True}, None, None, id="number-null"),
        pytest.param(".nan", "number", {}, MISSING, "expected a finite number, got nan",
                     id="number-nan"),
        pytest.param("abc", "number", {}, MISSING, "expected a number, got 'abc'",
                     id="number-text"),
        pytest.param("2", "text", {}, "2", None, id="text-from-number"),
        pytest.param("[a]", "text", {}, None, "expected a single value, got a list",
                     id="text-from-list"),
        pytest.param("maybe", "boolean", {}, None, "expected true or false, got 'maybe'",
                     id="boolean-from-text"),
        pytest.param("yes", "boolean", {}, True, None, id="yaml-1-1-yes-is-true"),  # PyYAML
        pytest.param("false", "boolean", {}, False, None, id="boolean"),
        pytest.param("up", "choice", {"options": ("rising", "falling")}, None,
                     "expected one of rising, falling, got 'up'", id="choice"),
        pytest.param("[a, b]", "text_list", {}, ("a", "b"), None, id="text-list"),
        pytest.param("{a: 1}", "scalar_value", {}, None,
                     "expected a single value, got a mapping", id="scalar-from-mapping"),
        pytest.param("2020-01-01", "scalar_value", {}, None,
                     "expected a number, text or true/false, got datetime.date(2020, 1, 1)",
                     id="scalar-date"),
    ],
)
def test_scalar_readers(
    text: str, method: str, kwargs: dict[str, object], value: object, error: str | None
) -> None:
    r = NodeReader("f.yaml")
    got = getattr(r, method)(_node(text), ("k",), **kwargs)
    assert got is value or got == value
    assert _errors(r) == ([] if error is None else [f"f.yaml:1:1: k: {error}"])


def test_locate_walks_as_far_as_the_nodes_go() -> None:
    root = _node("enter: [1, 2]\nexit: [0]\n")
    node, path = NodeReader.locate(root, ("enter", 1))
    assert (path, node.start_mark.line, node.start_mark.column) == (("enter", 1), 0, 11)
    node, path = NodeReader.locate(root, ("exit", 3))
    assert path == ("exit", 3) and isinstance(node, yaml.SequenceNode)  # stops at the list


def test_build_reports_a_field_error_at_the_field_node() -> None:
    def factory(**_: object) -> None:
        raise FieldError(("exit", 0), "50 is above the enter threshold 40")

    r = NodeReader("county.yaml")
    assert r.build(_node("enter: [40]\nexit: [50]\n"), ("criteria", 1), factory) is None
    assert _errors(r) == [
        "county.yaml:2:8: criteria[1].exit[0]: 50 is above the enter threshold 40"
    ]
