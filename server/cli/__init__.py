"""The ``tierwise`` command."""

from server.cli.main import app, main

__all__ = ["app", "main"]
