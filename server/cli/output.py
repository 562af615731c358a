"""The CLI's output layer: the only place that prints."""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from functools import wraps
from typing import Any, TypeVar

import typer
from pydantic import ValidationError
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

from server.feeds.errors import FeedFileError
from server.services.errors import ServiceError
from server.store.errors import StoreError

console = Console()
err_console = Console(stderr=True)

F = TypeVar("F", bound=Callable[..., Any])

EXPECTED_ERRORS: tuple[type[Exception], ...] = (StoreError, ServiceError, FeedFileError)


def fail(message: str) -> typer.Exit:
    """Print one line on stderr and return the exit to raise."""
    err_console.print(f"[bold red]error:[/] {message}", highlight=False, soft_wrap=True)
    return typer.Exit(code=1)


def warn(message: str) -> None:
    """Print one warning line on stderr (stdout may be carrying a CSV)."""
    err_console.print(f"[bold yellow]warning:[/] {message}", highlight=False, soft_wrap=True)


def settings_error_line(exc: ValidationError) -> str:
    parts = []
    for error in exc.errors():
        field = ".".join(str(p) for p in error.get("loc", ()))
        name = f"TIERWISE_{field.upper()}: " if field else ""
        parts.append(f"{name}{error['msg'].removeprefix('Value error, ')}")
    return "; ".join(parts)


def friendly_errors(func: F) -> F:
    """Turn expected failures into one readable line and exit status 1 (no traceback)."""

    @wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except ValidationError as exc:
            raise fail(settings_error_line(exc)) from None
        except EXPECTED_ERRORS as exc:
            raise fail(str(exc).splitlines()[0] if str(exc) else type(exc).__name__) from None

    return wrapper  # type: ignore[return-value]


@contextmanager
def progress_bar(description: str, total: int) -> Iterator[Callable[[int], None]]:
    """A progress bar on stderr; yields ``advance(n)``. Quiet when stderr is not a terminal."""
    with Progress(
        TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
        console=err_console, transient=False, disable=not sys.stderr.isatty(),
    ) as progress:
        task = progress.add_task(description, total=total)
        yield lambda n=1: progress.advance(task, n)


def say(message: str) -> None:
    console.print(message, highlight=False, soft_wrap=True)
