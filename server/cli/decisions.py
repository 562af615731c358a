"""``tierwise decisions import FILE``: official tiers decided before tierwise."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from server.cli.feeds import _database, _settings
from server.cli.output import friendly_errors, say

decisions_app = typer.Typer(help="Official tier decisions.", no_args_is_help=True)


@decisions_app.command("import")
@friendly_errors
def import_command(
    file: Annotated[Path, typer.Argument(help="CSV: region,effective_date,tier,reason"
                                              "[,decided_by][,decided_at].",
                                         exists=True, dir_okay=False, readable=True)],
    published: Annotated[bool, typer.Option(
        "--published/--unpublished",
        help="Mark the decisions published at their decision time (they were the public "
             "tiers), or leave them for an approver to publish.")] = True,
    dry_run: Annotated[bool, typer.Option("--dry-run", help="Check only; store nothing.")] = False,
    policy: Annotated[str | None, typer.Option(
        "--policy", help="The active policy (ruleset name) the decisions belong to; default: "
                         "the lead policy.")] = None,
) -> None:
    """Record a district's official tiers from before tierwise (docs/decisions.md).

    Every row is checked first; one bad row stores nothing and is named with its line and
    column. Importing the same file again stores nothing."""
    from server.services.official_history import (
        import_official_history,
        read_official_history,
    )

    records = read_official_history(file)
    db = _database(_settings())
    try:
        # a dry run works in a plain session, closed without a commit: nothing is kept
        with db.sessions() if dry_run else db.transaction() as session:
            result = import_official_history(
                session=session, records=records, source=str(file), actor="cli",
                published=published, policy=policy,
            )
    finally:
        db.dispose()
    span = f" effective {result.first} to {result.last}" if result.first else ""
    verb = "would store" if dry_run else "stored"
    say(f"{file}: {verb} {result.stored} decisions for {len(result.regions)} districts{span}; "
        f"{result.skipped} already recorded")
