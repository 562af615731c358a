"""Errors of the use cases, each naming the offending input."""

from __future__ import annotations


class ServiceError(Exception):
    """Base class of service errors."""


class InputFileError(ServiceError, ValueError):
    """A file a user handed in is broken; says which file, where and what."""

    def __init__(self, path: str, where: str, problem: str) -> None:
        self.path = path
        self.where = where
        self.problem = problem
        location = f"{path}: {where}" if where else path
        super().__init__(f"{location}: {problem}")


class FormFieldError(ServiceError, ValueError):
    """A form or option value the service refuses; ``field`` names the field."""

    def __init__(self, field: str, message: str) -> None:
        self.field = field
        super().__init__(f"{field}: {message}")


def checked_note(note: str, *, limit: int, missing: str, error: type[FormFieldError]) -> str:
    """``note`` stripped; refused as field ``note`` (``missing``) when empty, or when longer
    than ``limit`` characters."""
    text = note.strip()
    if not text:
        raise error("note", missing)
    if len(text) > limit:
        raise error("note", f"{len(text)} characters, more than {limit}")
    return text


class SchemaOutOfDateError(ServiceError, RuntimeError):
    """The database is not at the newest migration."""

    def __init__(self, current: str | None, head: str | None) -> None:
        self.current = current
        self.head = head
        found = current or "an empty database"
        super().__init__(
            f"the database schema is at {found}, tierwise needs {head}; run `tierwise db upgrade`"
        )


class UnknownRoleError(ServiceError, ValueError):
    def __init__(self, role: str, allowed: tuple[str, ...]) -> None:
        super().__init__(f"unknown role {role!r}; choose one of {', '.join(allowed)}")


class DuplicateUserError(ServiceError, ValueError):
    def __init__(self, name: str) -> None:
        super().__init__(f"a user named {name!r} already exists")


class NotADemoDatabaseError(ServiceError, RuntimeError):
    """Refuse to wipe a database that holds data the demo did not put there."""

    def __init__(self, url: str) -> None:
        super().__init__(
            f"{url} holds regions that the demo did not create; refusing to overwrite it. "
            "Point TIERWISE_DATABASE_URL at an empty or demo database."
        )


class EstimateOptionError(ServiceError, ValueError):
    """An option of the estimate use case is out of range; names the option and its value."""
