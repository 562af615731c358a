"""The ASGI application: ``create_app(settings)`` builds everything; nothing is built at import."""

from __future__ import annotations

from collections.abc import AsyncIterator, Callable, Sequence
from contextlib import AbstractContextManager, ExitStack, asynccontextmanager
from pathlib import Path

from fastapi import FastAPI
from fastapi.responses import RedirectResponse
from fastapi.staticfiles import StaticFiles

from server.config import Settings
from server.readmodels.cache import BoundedCache
from server.services.auth import LoginLimiter, SessionSigner
from server.services.backtest_jobs import BacktestJobs
from server.services.database import Database
from server.services.evaluation_worker import EvaluationWorker
from server.services.feeds import catalogue_limits, load_catalogue
from server.services.notify import notify_config_from
from web import (
    assets,
    downloads,
    effects,
    health,
    login,
    policies,
    public,
    review,
    staff,
    users,
)
from web.apidocs import mount_api_docs
from web.caching import PageCache, StampInvalidator, StampMemo
from web.errors import install_error_handlers
from web.feeds_api import router as feeds_api_router
from web.mapsvg import SvgMap
from web.security import SecurityHeaders
from web.staff_feeds import router as staff_feeds_router
from web.templating import local_time, make_templates  # noqa: F401 - local_time: older imports

STATIC = Path(__file__).with_name("static")


BackgroundTask = Callable[[Database], AbstractContextManager[object]]


def create_app(
    settings: Settings,
    *,
    database: Database | None = None,
    background: Sequence[BackgroundTask] = (),
) -> FastAPI:
    """Build the app for ``settings``; a ``database`` may be handed in (tests share one).

    ``background`` holds context managers that run for the app's lifetime, entered at start-up
    with the database (the entry point passes the feed scheduler this way; the web layer itself
    does not know about it).
    """
    db = database or Database.from_settings(settings)
    owns_db = database is None

    @asynccontextmanager
    async def lifespan(_app: FastAPI) -> AsyncIterator[None]:
        with ExitStack() as stack:
            for task in background:
                stack.enter_context(task(db))
            # the start-up check: evaluates data a killed process landed but did not evaluate
            _app.state.evaluations.request()
            yield
        _app.state.evaluations.close()
        _app.state.backtests.close()  # drops queued backtests, stops a running one
        if owns_db:
            db.dispose()

    app = FastAPI(
        title="tierwise",
        summary="Regional alert tiers with explanations, for public health offices",
        version="0.1.0",
        lifespan=lifespan,
        docs_url=None,  # served by web.apidocs from local files
        redoc_url=None,
    )
    app.state.settings = settings
    app.state.database = db
    app.state.templates = make_templates(settings)
    app.state.notify = notify_config_from(settings.notify_file)
    app.state.signer = SessionSigner(settings.secret_key)
    app.state.login_limiter = LoginLimiter(db)
    app.state.page_cache = PageCache(size=4096)
    app.state.public_stamps = StampMemo()
    # jobs run in this process; their state is in the database (server/services/backtest_jobs)
    app.state.backtests = BacktestJobs(db, time_zone=settings.zone)
    # per worker, under keys that change with the data: the projected staff map (the newest
    # few) and the rendered "Data on hand" section (web/staff.py)
    app.state.maps = BoundedCache[str, SvgMap](size=8)
    app.state.staff_fragments = BoundedCache[tuple[object, ...], str](size=4)
    # one evaluation thread per process; pushes and uploads ask it and do not wait
    app.state.evaluations = EvaluationWorker(
        db, notify=app.state.notify, limits=lambda: catalogue_limits(load_catalogue(settings)),
    )
    app.add_middleware(StampInvalidator)
    app.add_middleware(SecurityHeaders)
    install_error_handlers(app)
    app.include_router(assets.router)  # before the /static mount, which would shadow it
    mount_api_docs(app)
    app.mount("/static", StaticFiles(directory=STATIC), name="static")
    # Pages link the SVG icon; clients that ask for /favicon.ico anyway are sent to it.
    app.add_api_route("/favicon.ico", _favicon, methods=["GET", "HEAD"], include_in_schema=False)
    app.include_router(health.router)
    app.include_router(login.router, prefix="/staff")
    app.include_router(review.router, prefix="/staff")
    app.include_router(review.api_router)
    app.include_router(policies.router, prefix="/staff")
    app.include_router(users.router, prefix="/staff")
    app.include_router(effects.router, prefix="/staff")
    app.include_router(staff_feeds_router, prefix="/staff")
    app.include_router(feeds_api_router)
    app.include_router(staff.router, prefix="/staff")
    app.include_router(public.router)
    app.include_router(downloads.router)
    return app


def _favicon() -> RedirectResponse:
    return RedirectResponse("/static/favicon.svg", status_code=301)


def app_from_environment() -> FastAPI:
    """ASGI factory for ``uvicorn --factory`` and multi-worker serving: settings from TIERWISE_*."""
    return create_app(Settings())
