"""``tierwise ingest``, ``tierwise feeds ...`` and ``tierwise scheduler``."""

from __future__ import annotations

import logging
import os
import signal
import threading
from datetime import UTC, datetime
from pathlib import Path
from typing import Annotated

import typer
from rich.table import Table

from demo_seed.feeds import DEMO_FEEDS_FILE
from server.cli.output import console, fail, friendly_errors, progress_bar, say
from server.config import Settings
from server.feeds.definition import FeedCatalogue
from server.feeds.sources import Payload
from server.services.database import Database
from server.services.feed_health import feed_statuses
from server.services.feed_push import issue_token
from server.services.feed_runs import run_feed
from server.services.feed_state import ingest_recorded, plural
from server.services.feeds import catalogue_limits, feed_named, feeds_file, load_catalogue
from server.services.ingest import IngestReceipt
from server.services.notify import notify_config_from

feeds_app = typer.Typer(help="Configured data feeds: health, push tokens, runs.",
                        no_args_is_help=True)

FeedsFileOption = Annotated[
    Path | None,
    typer.Option("--feeds-file", help="Feed definitions (default: TIERWISE_FEEDS_FILE, else the "
                                      "demo's feeds)."),
]


def _settings() -> Settings:
    # These commands sign nothing, so a missing secret key is tolerated (as for `db upgrade`).
    if os.environ.get("TIERWISE_SECRET_KEY"):
        return Settings()
    return Settings(secret_key="unused-by-feed-commands")


def configured_catalogue(settings: Settings, override: Path | None = None) -> FeedCatalogue:
    """The feed catalogue of the CLI: ``override``, else ``TIERWISE_FEEDS_FILE``, else the
    demo's feeds (said on the console)."""
    if override is not None:
        return load_catalogue(settings.model_copy(update={"feeds_file": override}))
    if feeds_file(settings) is None:
        say(f"(TIERWISE_FEEDS_FILE is not set; using the demo feeds in {DEMO_FEEDS_FILE})")
        return load_catalogue(settings.model_copy(update={"feeds_file": DEMO_FEEDS_FILE}))
    return load_catalogue(settings)


def _database(settings: Settings) -> Database:
    db = Database.from_settings(settings)
    db.check()
    return db


def print_receipt(receipt: IngestReceipt) -> None:
    """Summary of accepted rows and of rejected rows by reason, with the first line numbers."""
    if receipt.unchanged:
        say(f"{receipt.source}: identical to vintage {receipt.identical_to} of feed "
            f"{receipt.feed!r}; nothing changed")
        return
    mode = " (dry run: nothing stored)" if receipt.dry_run else ""
    table = Table(title=f"{receipt.source} -> feed {receipt.feed}{mode}", title_justify="left")
    table.add_column("outcome", overflow="fold")
    table.add_column("rows", justify="right")
    table.add_column(f"first {receipt.unit}s", overflow="fold")
    table.add_column("example", overflow="fold")
    table.add_row("accepted", f"{receipt.rows_accepted:,}", "", "")
    for r in receipt.reasons:
        table.add_row(f"rejected: {r.reason}", f"{r.count:,}",
                      ", ".join(str(n) for n in r.first_lines), r.example)
    console.print(table)
    if receipt.vintage_id is not None:
        say(f"vintage {receipt.vintage_id}: {receipt.rows_accepted:,} "
            f"{plural(receipt.rows_accepted, 'row')} accepted, {receipt.rows_rejected:,} rejected")


@friendly_errors
def ingest_command(
    file: Annotated[Path, typer.Argument(help="CSV or JSON file to take in.", exists=True,
                                         dir_okay=False, readable=True)],
    feed: Annotated[str, typer.Option("--feed", help="Name of the configured feed.")],
    dry_run: Annotated[bool, typer.Option("--dry-run", help="Validate only; store nothing.")] = (
        False
    ),
    feeds_file_option: FeedsFileOption = None,
) -> None:
    """Validate FILE against a feed's definition and land its good rows as one vintage.

    Prints accepted rows and rejected rows by reason (first line numbers of each); exits with
    status 1 when the whole file was rejected. Re-ingesting identical content changes nothing.
    """
    settings = _settings()
    catalogue = configured_catalogue(settings, feeds_file_option)
    definition = feed_named(catalogue, feed)
    db = _database(settings)
    try:
        payload = Payload.from_path(file)
        with progress_bar(f"ingesting {file.name}", total=max(payload.size, 1)) as advance:
            outcome = ingest_recorded(
                db, feed=definition, payload=payload, time_zone=settings.time_zone,
                dry_run=dry_run, progress=advance, evaluate=True,
                notify=notify_config_from(settings.notify_file),
                stale_after=catalogue_limits(catalogue), precedence=catalogue.precedence(),
            )
    finally:
        db.dispose()
    print_receipt(outcome.receipt)
    if outcome.evaluation is not None:
        say(f"evaluated {outcome.evaluation.ruleset_name}: "
            f"{outcome.evaluation.written:,} assessments")
    if outcome.receipt.whole_file_rejected:
        raise fail(f"{file}: every row was rejected")


@feeds_app.command("status")
@friendly_errors
def status_command(feeds_file_option: FeedsFileOption = None) -> None:
    """Every configured feed's health: last run, last error, last vintage, stale regions."""
    settings = _settings()
    catalogue = configured_catalogue(settings, feeds_file_option)
    db = _database(settings)
    try:
        with db.transaction() as session:
            statuses = feed_statuses(session=session, catalogue=catalogue,
                                     now=datetime.now(UTC), time_zone=settings.time_zone)
    finally:
        db.dispose()
    table = Table(title=f"feeds in {catalogue.path}", title_justify="left")
    for column in ("feed", "kind", "schedule", "health", "last success", "last vintage",
                   "accepted/rejected", "regions", "stale", "last error"):
        table.add_column(column, overflow="fold", no_wrap=column == "feed")
    for s in statuses:
        table.add_row(
            s.name, s.kind, s.schedule, "ok" if s.healthy else s.health.upper(),
            s.last_success_at.isoformat(timespec="minutes") if s.last_success_at else "never",
            s.last_received_at.isoformat(timespec="minutes") if s.last_received_at else "none",
            f"{s.last_accepted:,}/{s.last_rejected:,}", str(s.regions),
            ", ".join(s.stale_regions[:8]) + (" ..." if len(s.stale_regions) > 8 else ""),
            s.last_error[:120],
        )
    console.print(table)


@feeds_app.command("token")
@friendly_errors
def token_command(
    feed: Annotated[str, typer.Argument(help="Push feed to issue a token for.")],
    feeds_file_option: FeedsFileOption = None,
) -> None:
    """Issue a new bearer token for a push feed (replaces the old one; shown only once)."""
    settings = _settings()
    definition = feed_named(configured_catalogue(settings, feeds_file_option), feed)
    db = _database(settings)
    try:
        with db.transaction() as session:
            token = issue_token(session=session, feed=definition.name, actor="cli")
    finally:
        db.dispose()
    say(f"token for feed {feed!r} (store it now; only its hash is kept):")
    say(token)


@feeds_app.command("run")
@friendly_errors
def run_command(
    feed: Annotated[str, typer.Argument(help="File-drop or HTTP feed to run now.")],
    feeds_file_option: FeedsFileOption = None,
) -> None:
    """Run one pulled feed now, as the scheduler would."""
    settings = _settings()
    catalogue = configured_catalogue(settings, feeds_file_option)
    definition = feed_named(catalogue, feed)
    db = _database(settings)
    try:
        run = run_feed(
            db, feed=definition, time_zone=settings.time_zone, environ=os.environ,
            notify=notify_config_from(settings.notify_file),
            stale_after=catalogue_limits(catalogue), precedence=catalogue.precedence(),
        )
    finally:
        db.dispose()
    if run.not_modified:
        say(f"{feed}: source not modified; nothing to do")
    for receipt in run.receipts:
        print_receipt(receipt)
    for error in run.errors:
        say(f"error: {error}")
    if run.errors and not run.receipts:
        raise typer.Exit(code=1)


@friendly_errors
def scheduler_command(
    lease_seconds: Annotated[float, typer.Option(help="Leader lease length.")] = 30.0,
    feeds_file_option: FeedsFileOption = None,
) -> None:
    """Run the feed scheduler in the foreground (one leader among all instances; Ctrl-C stops)."""
    from server.scheduler.feed_scheduler import FeedScheduler

    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(message)s")
    settings = _settings()
    catalogue = configured_catalogue(settings, feeds_file_option)
    db = _database(settings)
    scheduler = FeedScheduler(db, catalogue=catalogue, time_zone=settings.time_zone,
                              environ=os.environ, lease_seconds=lease_seconds)
    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    scheduler.start()
    say(f"scheduler {scheduler.holder} started with {len(catalogue)} feed(s); Ctrl-C stops")
    try:
        while not stop.wait(1.0):
            pass
    except KeyboardInterrupt:
        pass
    finally:
        scheduler.stop()
        db.dispose()
    say("scheduler stopped")
