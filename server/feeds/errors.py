"""Errors raised while reading feed definitions and input files."""

from __future__ import annotations


class FeedFileError(ValueError):
    """A file is broken as a whole or at one place; the message names file, place and problem."""

    def __init__(self, path: str, where: str, problem: str) -> None:
        self.path = path
        self.where = where
        self.problem = problem
        super().__init__(f"{path}: {where}: {problem}" if where else f"{path}: {problem}")


class FeedConfigError(ValueError):
    """A feed definition file is invalid; names file, line, column and key path.

    Example: ``feeds.yaml:12:5: feeds[1].schedule.cron: 'every day' is not a cron expression``.
    """

    def __init__(self, path: str, line: int, column: int, key: str, problem: str) -> None:
        self.path = path
        self.line = line
        self.column = column
        self.key = key
        self.problem = problem
        place = f"{path}:{line}:{column}" if line else path
        super().__init__(f"{place}: {key}: {problem}" if key else f"{place}: {problem}")


class HeaderError(FeedFileError):
    """The header lacks required columns; the whole file is rejected."""

    def __init__(
        self, path: str, expected: list[str], found: list[str], delimiter: str | None = None
    ) -> None:
        self.expected = expected
        self.found = found
        missing = [c for c in expected if c not in found]
        hint = ""
        if delimiter is not None and len(found) == 1:
            other = next((d for d in (",", ";", "\t") if d != delimiter and d in found[0]), None)
            if other is not None:
                hint = (f". The header seems to be separated by {DELIMITER_NAMES[other]} but this "
                        f"feed expects {DELIMITER_NAMES[delimiter]}: save the file with "
                        f"{DELIMITER_NAMES[delimiter]} as the separator")
        super().__init__(
            path, "line 1",
            f"header lacks column(s) {missing}; expected {expected}, found {found}{hint}",
        )


DELIMITER_NAMES = {",": "commas (,)", ";": "semicolons (;)", "\t": "tabs"}


UTF8_NAMES = ("utf-8", "utf8", "utf_8", "utf-8-sig")


class EncodingError(FeedFileError):
    """The bytes are not text in the feed's declared encoding (UTF-8 unless configured)."""

    def __init__(self, path: str, offset: int, encoding: str, line: int | None = None) -> None:
        self.offset = offset
        self.encoding = encoding
        self.line = line
        where = f"line {line}, byte {offset}" if line is not None else f"byte {offset}"
        super().__init__(
            path, where,
            f"the file is not valid {encoding} text. It was probably saved in another encoding"
            f"{' (such as Windows-1252 or Latin-1)' if encoding.lower() in UTF8_NAMES else ''}: "
            f"save it as {encoding} and send it again, or ask the administrator of the feed "
            f"definitions to declare the encoding this feed uses",
        )


class EmptyFileError(FeedFileError):
    """The file has no data: no bytes at all, or a header and no rows."""


class FetchError(RuntimeError):
    """A pull from a source failed; ``transient`` says whether retrying may help."""

    def __init__(self, source: str, problem: str, *, transient: bool) -> None:
        self.source = source
        self.problem = problem
        self.transient = transient
        super().__init__(f"{source}: {problem}")


class TransientFetchError(FetchError):
    """Connection error, timeout or HTTP 5xx: retried with backoff."""

    def __init__(self, source: str, problem: str) -> None:
        super().__init__(source, problem, transient=True)


class PermanentFetchError(FetchError):
    """HTTP 4xx, a body over the size limit, a missing token: not retried."""

    def __init__(self, source: str, problem: str) -> None:
        super().__init__(source, problem, transient=False)
