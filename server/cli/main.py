"""Entry point of the ``tierwise`` command: settings are built here and passed down."""

from __future__ import annotations

import os
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Annotated

import typer

from server.cli.decisions import decisions_app
from server.cli.effects import effects_app
from server.cli.estimate import estimate_command
from server.cli.feeds import feeds_app, ingest_command, scheduler_command
from server.cli.output import fail, friendly_errors, progress_bar, say
from server.cli.rules import backtest_command, evaluate_command, rules_app
from server.config import Settings, masked_url
from server.services.database import Database

app = typer.Typer(
    name="tierwise",
    help=(
        "tierwise: regional alert tiers for public health offices. Every command reads its "
        "configuration from TIERWISE_* environment variables (TIERWISE_DATABASE_URL chooses the "
        "database; the default is a SQLite file under ./var)."
    ),
    no_args_is_help=True,
    add_completion=False,
)
db_app = typer.Typer(help="Create or migrate the database schema.", no_args_is_help=True)
regions_app = typer.Typer(help="Manage the map of regions (districts and their areas).",
                          no_args_is_help=True)
users_app = typer.Typer(help="Manage staff accounts.", no_args_is_help=True)
app.add_typer(db_app, name="db")
app.add_typer(regions_app, name="regions")
app.add_typer(users_app, name="users")
app.command("estimate")(estimate_command)
app.add_typer(rules_app, name="rules")
app.command("backtest")(backtest_command)
app.command("evaluate")(evaluate_command)
app.add_typer(feeds_app, name="feeds")
app.command("ingest")(ingest_command)
app.command("scheduler")(scheduler_command)
app.add_typer(decisions_app, name="decisions")
app.add_typer(effects_app, name="effects")


def _settings(**overrides: object) -> Settings:
    return Settings(**overrides)  # type: ignore[arg-type]


def _shown(url: str) -> str:
    """A database URL fit to print: the password masked."""
    return masked_url(url)


def _admin_settings() -> Settings:
    """Settings for commands that sign nothing (migrate, import, add users): the secret key is not
    used there, so the built-in one is tolerated; ``serve`` always insists on a real key."""
    return Settings(demo_mode=True)


def _database(settings: Settings, *, check: bool = True) -> Database:
    db = Database.from_settings(settings)
    if check:
        db.check()
    return db


@app.command()
@friendly_errors
def demo(
    port: Annotated[int, typer.Option(help="Port to serve on (127.0.0.1 only).")] = 8000,
    days: Annotated[int, typer.Option(min=150, max=3650, help="Days of invented history.")] = 548,
    seed: Annotated[int, typer.Option(help="Random seed of the invented epidemic.")] = 7,
    end_date: Annotated[
        str | None, typer.Option(help="Last day of data, YYYY-MM-DD (default: yesterday).")
    ] = None,
    serve: Annotated[bool, typer.Option("--serve/--no-serve", help="Serve after seeding.")] = True,
    scheduler: Annotated[
        bool,
        typer.Option(
            "--scheduler/--no-scheduler",
            help="Run the demo feeds' schedules while serving (off by default); the demo then "
            "starts a stand-in for the invented water authority's server on 127.0.0.1:8765.",
        ),
    ] = False,
) -> None:
    """Create (or refresh) a demo database with an invented county and serve it.

    Everything the demo shows (places, people, numbers) is invented. The database is wiped and
    seeded again on every run, so a second run gives the same result; a database holding data
    that the demo did not create is never touched.
    """
    from demo_seed.seed import seed_demo
    from demo_seed.story import demo_morning, morning_lines

    end = date.fromisoformat(end_date) if end_date else None
    from demo_seed.feeds import DEMO_FEEDS_FILE, DEMO_TIME_ZONE

    feeds = {} if os.environ.get("TIERWISE_FEEDS_FILE") else {"feeds_file": DEMO_FEEDS_FILE}
    zone = {} if os.environ.get("TIERWISE_TIME_ZONE") else {"time_zone": DEMO_TIME_ZONE}
    settings = _settings(demo_mode=True, scheduler=scheduler, **feeds, **zone)
    db = _database(settings, check=False)
    try:
        summary = seed_demo(
            db, seed=seed, days=days, end=end, rules_dir=settings.rules_dir, progress=progress_bar,
            history=True,
        )
        morning = demo_morning(db, now=datetime.now(UTC), time_zone=settings.time_zone)
    finally:
        db.dispose()
    say(
        f"Seeded {summary.districts} districts, {summary.vintages} vintages through the demo "
        f"feeds, "
        f"{summary.observations:,} observations from {summary.start} to {summary.end} "
        f"into {_shown(settings.database_url)}"
    )
    say(f"Evaluated policy {summary.ruleset}: {summary.assessments:,} district-day assessments")
    for name, written in summary.policies[1:]:
        say(f"Evaluated policy {name} as well: {written:,} region-day assessments")
    say(f"Recorded {summary.decisions} past official decisions of the invented office "
        "(published)")
    for line in morning_lines(morning):
        say(line)
    for name, role, password in summary.users:
        say(f"  demo user {name!r} ({role}), password {password!r}")
    for feed, token in summary.push_tokens.items():
        say(f"  push token of feed {feed!r}: {token}")
    authority = None
    if serve and scheduler:
        from demo_seed.standin import PORT, WaterAuthority

        try:
            authority = WaterAuthority(summary.wastewater_csv).start()
            say(f"Invented water authority's stand-in serving {authority.url} "
                "(the wastewater-http feed pulls it every 6 h)")
        except OSError as exc:
            say(f"Could not start the water authority's stand-in on 127.0.0.1:{PORT} ({exc}); "
                "the wastewater-http feed's pulls will fail")
    say(f"Office time zone: {settings.time_zone} (every page shows its times in it)")
    say(f"Public view: http://127.0.0.1:{port}/")
    say(f"Staff pages: http://127.0.0.1:{port}/staff/")
    say(f"API docs:    http://127.0.0.1:{port}/docs")
    if serve:
        try:
            _run_server(settings, host="127.0.0.1", port=port, workers=1)
        finally:
            if authority is not None:
                authority.stop()


@app.command("serve")
@friendly_errors
def serve_command(
    host: Annotated[str, typer.Option(help="Address to listen on.")] = "127.0.0.1",
    port: Annotated[int, typer.Option(help="Port to listen on.")] = 8000,
    workers: Annotated[int, typer.Option(min=1, help="Web worker processes.")] = 1,
) -> None:
    """Serve the web interface and the API (the database must be migrated)."""
    settings = _settings()
    _database(settings).dispose()
    _run_server(settings, host=host, port=port, workers=workers)


def _run_server(settings: Settings, *, host: str, port: int, workers: int) -> None:
    """Serve the app; the feed scheduler runs inside unless ``TIERWISE_SCHEDULER=false``."""
    import uvicorn

    if workers > 1:
        # Worker processes build their own app (and scheduler candidate) from the environment.
        os.environ.setdefault("TIERWISE_DATABASE_URL", settings.database_url)
        os.environ["TIERWISE_SCHEDULER"] = "true" if settings.scheduler else "false"
        if settings.feeds_file is not None:
            os.environ["TIERWISE_FEEDS_FILE"] = str(settings.feeds_file)
        if settings.demo_mode:
            os.environ["TIERWISE_DEMO_MODE"] = "true"
        uvicorn.run(
            "server.cli.asgi:app_from_environment", factory=True, host=host, port=port,
            workers=workers,
        )
        return
    from server.cli.asgi import build_app

    uvicorn.run(build_app(settings), host=host, port=port)


@db_app.command("upgrade")
@friendly_errors
def db_upgrade() -> None:
    """Apply every pending migration (safe to run again)."""
    settings = _admin_settings()
    db = _database(settings, check=False)
    try:
        revision = db.upgrade()
    finally:
        db.dispose()
    say(f"database {_shown(settings.database_url)} is at revision {revision}")


@regions_app.command("import")
@friendly_errors
def regions_import(
    file: Annotated[
        Path, typer.Argument(help="GeoJSON FeatureCollection, one feature per region.")
    ],
) -> None:
    """Add or update regions from a GeoJSON file (properties: code, name, level, parent,
    population). The whole file is checked first; a broken file changes nothing."""
    from server.services.regions import import_regions

    db = _database(_admin_settings())
    try:
        with progress_bar(f"importing {file.name}", total=1) as advance, db.transaction() as s:
            result = import_regions(session=s, path=file)
            advance(1)
    finally:
        db.dispose()
    say(f"{file}: {result.added} regions added, {result.updated} updated")


@users_app.command("add")
@friendly_errors
def users_add(
    name: Annotated[str, typer.Argument(help="Login name.")],
    role: Annotated[str, typer.Option(help="viewer, analyst, approver or admin.")],
    password: Annotated[
        str | None,
        typer.Option(help="Password (prompted for when left out; an option ends up in history)."),
    ] = None,
) -> None:
    """Create a staff account."""
    from server.services.users import ROLES, add_user

    if role not in ROLES:
        raise fail(f"unknown role {role!r}; choose one of {', '.join(ROLES)}")
    secret = password or typer.prompt("Password", hide_input=True, confirmation_prompt=True)
    db = _database(_admin_settings())
    try:
        with db.transaction() as session:
            add_user(session=session, name=name, role=role, password=secret)
    finally:
        db.dispose()
    say(f"user {name!r} added with role {role}")


def main() -> None:
    app()
