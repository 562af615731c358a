"""Errors raised by the store."""

from __future__ import annotations


class StoreError(Exception):
    """Base class of store errors."""


class DatabaseUnavailableError(StoreError, ConnectionError):
    """The database URL does not answer; the message is one line a user can act on."""

    def __init__(self, url: str, reason: str) -> None:
        self.url = url
        self.reason = reason
        super().__init__(f"cannot reach the database at {url}: {reason}")


class UnknownCodeError(StoreError, LookupError):
    """A region or measure code that the catalogue does not hold."""

    def __init__(self, kind: str, codes: list[str]) -> None:
        self.kind = kind
        self.codes = codes
        shown = ", ".join(repr(c) for c in codes[:10])
        more = f" and {len(codes) - 10} more" if len(codes) > 10 else ""
        super().__init__(f"unknown {kind} code(s): {shown}{more}")


class DuplicateKeyError(StoreError, ValueError):
    """The same (region, measure, ref_date) appears twice in one vintage."""

    def __init__(self, keys: list[tuple[str, str, str]]) -> None:
        self.keys = keys
        shown = "; ".join("/".join(k) for k in keys[:5])
        super().__init__(f"{len(keys)} duplicate key(s) in one vintage, e.g. {shown}")
