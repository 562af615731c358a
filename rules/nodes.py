"""Reading PyYAML nodes while keeping their marks, and collecting located errors.

The loader composes the text with ``yaml.compose(text, Loader=yaml.SafeLoader)`` (no objects are
constructed, so no tag can run code), then walks the node tree with a :class:`NodeReader`. Each
accessor checks the node's kind and type, records a :class:`~rules.errors.RulesetError` with file,
line, column and key path when it is wrong, and returns ``None`` so reading can go on and report
several problems at once.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any, TypeVar

import yaml
from yaml.constructor import SafeConstructor

from rules.errors import FieldError, RulesetError, dotted_path

__all__ = ["MISSING", "NodeReader", "Path"]

Path = tuple[str | int, ...]
T = TypeVar("T")
MISSING: Any = object()


class NodeReader:
    """Typed access to composed YAML nodes that records located errors.

    Parameters
    ----------
    source : str
        File name used in error messages.
    """

    def __init__(self, source: str) -> None:
        self.source = source
        self.errors: list[RulesetError] = []
        self._constructor = SafeConstructor()

    # -- errors ---------------------------------------------------------------------------------
    def error(self, node: yaml.Node | None, path: Path, message: str) -> None:
        """Record one problem at ``node`` (line and column are 1-based)."""
        line = node.start_mark.line + 1 if node is not None else 0
        col = node.start_mark.column + 1 if node is not None else 0
        self.errors.append(RulesetError(self.source, line, col, dotted_path(path), message))

    def build(
        self, node: yaml.Node, path: Path, factory: Callable[..., T], **kwargs: Any
    ) -> T | None:
        """Call ``factory(**kwargs)``; a :class:`FieldError` is reported at the field's node."""
        try:
            return factory(**kwargs)
        except FieldError as exc:
            target, rel = self.locate(node, exc.field)
            self.error(target, path + rel, exc.message)
            return None

    @staticmethod
    def locate(node: yaml.Node, field: Path) -> tuple[yaml.Node, Path]:
        """Walk ``field`` down from ``node`` as far as the nodes go; return the node and path."""
        walked: list[str | int] = []
        for part in field:
            child: yaml.Node | None = None
            if isinstance(node, yaml.MappingNode) and isinstance(part, str):
                for key, value in node.value:
                    if isinstance(key, yaml.ScalarNode) and key.value == part:
                        child = value
            elif isinstance(node, yaml.SequenceNode) and isinstance(part, int):
                if 0 <= part < len(node.value):
                    child = node.value[part]
            if child is None:
                walked.append(part)
                break
            walked.append(part)
            node = child
        return node, tuple(walked)

    # -- structure ------------------------------------------------------------------------------
    def mapping(
        self,
        node: yaml.Node,
        path: Path,
        *,
        required: tuple[str, ...] = (),
        optional: tuple[str, ...] = (),
        free_keys: bool = False,
    ) -> dict[str, yaml.Node] | None:
        """Return a mapping node's entries; unknown, duplicate and missing keys are errors."""
        if not isinstance(node, yaml.MappingNode):
            self.error(node, path, f"expected a mapping, got {_kind(node)}")
            return None
        allowed = set(required) | set(optional)
        out: dict[str, yaml.Node] = {}
        for key, value in node.value:
            if not isinstance(key, yaml.ScalarNode) or key.tag != "tag:yaml.org,2002:str":
                self.error(key, path, f"keys must be plain text, got {_kind(key)}")
                continue
            name = key.value
            if name in out:
                self.error(key, path + (name,), f"duplicate key {name!r}")
                continue
            if not free_keys and name not in allowed:
                hint = ", ".join(sorted(allowed))
                self.error(key, path + (name,), f"unknown key {name!r} (expected one of: {hint})")
                continue
            out[name] = value
        for name in required:
            if name not in out:
                self.error(node, path, f"missing required key {name!r}")
        return out

    def sequence(self, node: yaml.Node, path: Path) -> list[yaml.Node] | None:
        """Return a sequence node's items."""
        if not isinstance(node, yaml.SequenceNode):
            self.error(node, path, f"expected a list, got {_kind(node)}")
            return None
        return list(node.value)

    # -- scalars --------------------------------------------------------------------------------
    def _scalar(self, node: yaml.Node, path: Path) -> Any:
        if not isinstance(node, yaml.ScalarNode):
            self.error(node, path, f"expected a single value, got {_kind(node)}")
            return MISSING
        try:
            return self._constructor.construct_object(node, deep=True)
        except (yaml.YAMLError, ValueError, TypeError, OverflowError) as exc:
            self.error(node, path, f"cannot read value {node.value!r}: {exc}")
            return MISSING

    def text(self, node: yaml.Node, path: Path) -> str | None:
        """A text value; plain numbers are taken as their literal text (``version: 2``)."""
        value = self._scalar(node, path)
        if value is MISSING:
            return None
        if isinstance(value, str):
            return value
        if isinstance(value, int | float) and not isinstance(value, bool):
            assert isinstance(node, yaml.ScalarNode)
            return str(node.value)
        self.error(node, path, f"expected text, got {value!r}")
        return None

    def integer(self, node: yaml.Node, path: Path, *, minimum: int | None = None) -> int | None:
        """An integer value, optionally at least ``minimum``."""
        value = self._scalar(node, path)
        if value is MISSING:
            return None
        if isinstance(value, bool) or not isinstance(value, int):
            self.error(node, path, f"expected an integer, got {value!r}")
            return None
        if minimum is not None and value < minimum:
            self.error(node, path, f"expected an integer >= {minimum}, got {value}")
            return None
        return value

    def number(self, node: yaml.Node, path: Path, *, nullable: bool = False) -> float | None:
        """A finite number (``null`` allowed when ``nullable``; returns ``MISSING`` on error)."""
        value = self._scalar(node, path)
        if value is MISSING:
            return MISSING  # type: ignore[no-any-return]
        if value is None and nullable:
            return None
        if isinstance(value, bool) or not isinstance(value, int | float):
            self.error(node, path, f"expected a number, got {value!r}")
            return MISSING  # type: ignore[no-any-return]
        if not math.isfinite(value):
            self.error(node, path, f"expected a finite number, got {value!r}")
            return MISSING  # type: ignore[no-any-return]
        return float(value)

    def boolean(self, node: yaml.Node, path: Path) -> bool | None:
        """A true/false value."""
        value = self._scalar(node, path)
        if value is MISSING:
            return None
        if not isinstance(value, bool):
            self.error(node, path, f"expected true or false, got {value!r}")
            return None
        return value

    def choice(self, node: yaml.Node, path: Path, options: tuple[str, ...]) -> str | None:
        """One of ``options``."""
        value = self.text(node, path)
        if value is None:
            return None
        if value not in options:
            self.error(node, path, f"expected one of {', '.join(options)}, got {value!r}")
            return None
        return value

    def scalar_value(self, node: yaml.Node, path: Path) -> int | float | str | bool | None:
        """Any plain scalar (for free-form parameters)."""
        value = self._scalar(node, path)
        if value is MISSING:
            return None
        if isinstance(value, float) and not math.isfinite(value):
            self.error(node, path, f"expected a finite number, got {value!r}")
            return None
        if not isinstance(value, int | float | str | bool):
            self.error(node, path, f"expected a number, text or true/false, got {value!r}")
            return None
        return value

    def text_list(self, node: yaml.Node, path: Path) -> tuple[str, ...] | None:
        """A list of text values."""
        items = self.sequence(node, path)
        if items is None:
            return None
        out = [self.text(item, path + (i,)) for i, item in enumerate(items)]
        if any(v is None for v in out):
            return None
        return tuple(v for v in out if v is not None)


def _kind(node: yaml.Node) -> str:
    if isinstance(node, yaml.MappingNode):
        return "a mapping"
    if isinstance(node, yaml.SequenceNode):
        return "a list"
    if isinstance(node, yaml.ScalarNode):
        return f"the value {node.value!r}"
    return type(node).__name__
