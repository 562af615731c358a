"""Errors raised by the demo scenario simulator.

All names, places and numbers are invented for the demo.
"""

from __future__ import annotations

__all__ = ["GeometryError", "ScenarioArgumentError"]


class ScenarioArgumentError(ValueError):
    """An argument of the simulator is out of range or of the wrong type."""

    def __init__(self, argument: str, value: object, reason: str) -> None:
        self.argument = argument
        self.value = value
        self.reason = reason
        super().__init__(f"{argument}={value!r}: {reason}")


class GeometryError(ValueError):
    """A polygon or point array given to the map helpers is malformed."""

    def __init__(self, argument: str, value: object, reason: str) -> None:
        self.argument = argument
        self.value = value
        self.reason = reason
        super().__init__(f"{argument}={value!r}: {reason}")
