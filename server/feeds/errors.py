"""Errors raised while reading input files."""

from __future__ import annotations


class FeedFileError(ValueError):
    """A file is broken as a whole or at one place; the message names file, place and problem."""

    def __init__(self, path: str, where: str, problem: str) -> None:
        self.path = path
        self.where = where
        self.problem = problem
        super().__init__(f"{path}: {where}: {problem}" if where else f"{path}: {problem}")
