"""ASGI factories for ``tierwise serve``: the web app plus the feed scheduler.

Each web worker joins the scheduler's leader election; only the leader runs feed jobs, and another
worker takes over when it dies (server/scheduler). The factory lives here, at the entry point,
because the web layer does not import the scheduler.
"""

from __future__ import annotations

from fastapi import FastAPI

from server.config import Settings
from server.scheduler.embedded import embedded_scheduler
from web.app import BackgroundTask, create_app


def scheduler_task(settings: Settings) -> BackgroundTask:
    """A background task that runs the feed scheduler (a no-op when it is switched off)."""
    return lambda db: embedded_scheduler(settings, db)


def build_app(settings: Settings) -> FastAPI:
    return create_app(settings, background=[scheduler_task(settings)])


def app_from_environment() -> FastAPI:
    """Factory for ``uvicorn --factory`` with several workers: settings from TIERWISE_*."""
    return build_app(Settings())
