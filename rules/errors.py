"""Errors raised by the rules engine.

:class:`RulesetError` is the one error a ruleset file can produce. It names the file, line, column
and key path of the offending node, e.g.::

    rules/policies/county.yaml:23:7: criteria[1].enter[2]: 40 is below the exit threshold 55

The loader collects every problem it finds and raises one :class:`RulesetError` whose ``errors``
attribute lists them all (the first one is the exception itself).
:class:`FieldError` is raised by the ruleset dataclasses when they validate themselves; the loader
turns it into a :class:`RulesetError` at the node the field came from.
:class:`EvaluationInputError` is raised by the evaluator when the indicator arrays do not fit the
ruleset.
:class:`StoredExplanationError` is raised by :func:`rules.record.read_explanation` when a stored
explanation lacks a key it needs.
"""

from __future__ import annotations

from collections.abc import Sequence

__all__ = ["EvaluationInputError", "FieldError", "RulesetError", "StoredExplanationError"]


class RulesetError(ValueError):
    """A problem in a ruleset file, located by file, line, column and key path.

    Parameters
    ----------
    file : str
        File name, or ``"<string>"`` for text parsed directly.
    line, column : int
        1-based position of the offending node (0 when unknown).
    path : str
        Key path from the document root, e.g. ``criteria[1].enter[2]`` (indices are 0-based).
    message : str
        What is wrong, naming the offending value.
    others : sequence of RulesetError, optional
        Further problems found in the same file.
    """

    def __init__(
        self,
        file: str,
        line: int,
        column: int,
        path: str,
        message: str,
        others: Sequence[RulesetError] = (),
    ) -> None:
        self.file = file
        self.line = line
        self.column = column
        self.path = path
        self.message = message
        self.errors: tuple[RulesetError, ...] = (self, *others)
        text = self.location()
        if others:
            text += f"\n({len(others)} more problem{'s' if len(others) > 1 else ''})\n"
            text += "\n".join(e.location() for e in others)
        super().__init__(text)

    def location(self) -> str:
        """Return ``file:line:column: path: message`` for this one problem."""
        where = f"{self.path}: " if self.path else ""
        return f"{self.file}:{self.line}:{self.column}: {where}{self.message}"


class FieldError(ValueError):
    """A ruleset dataclass refused one of its fields.

    Parameters
    ----------
    field : tuple of str or int
        Path of the field relative to the object being built, e.g. ``("enter", 2)``.
    message : str
        What is wrong, naming the offending value.
    """

    def __init__(self, field: tuple[str | int, ...], message: str) -> None:
        self.field = field
        self.message = message
        super().__init__(f"{_dotted(field)}: {message}" if field else message)


class EvaluationInputError(ValueError):
    """The indicator arrays, regions or dates given to the evaluator do not fit the ruleset.

    Parameters
    ----------
    argument : str
        The offending argument, e.g. ``indicators['incidence_7d'].lower``.
    message : str
        What is wrong, naming the offending value.
    """

    def __init__(self, argument: str, message: str) -> None:
        self.argument = argument
        super().__init__(f"{argument}: {message}")


class StoredExplanationError(ValueError):
    """A stored explanation (an assessment's ``explanation`` JSON) lacks a key or holds a
    value of the wrong kind.

    Parameters
    ----------
    path : str
        Key path inside the stored JSON, e.g. ``data.criteria[1].indicator``.
    message : str
        What is wrong, naming the offending value.
    """

    def __init__(self, path: str, message: str) -> None:
        self.path = path
        super().__init__(f"stored explanation: {path}: {message}")


def _dotted(path: Sequence[str | int]) -> str:
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}" if out else part
    return out


def dotted_path(path: Sequence[str | int]) -> str:
    """Render a key path as ``criteria[1].enter[2]``."""
    return _dotted(path)
