"""``tierwise rules check FILE``, ``tierwise backtest`` and ``tierwise evaluate``."""

from __future__ import annotations

from datetime import UTC, date, datetime
from pathlib import Path
from typing import Annotated

import typer
from rich.markup import escape

from rules import RulesetError, load_ruleset, summary
from server.cli.output import err_console, fail, friendly_errors, progress_bar, say
from server.config import Settings

rules_app = typer.Typer(help="Check tier-policy (ruleset) files.", no_args_is_help=True)


def _load(  # type: ignore[no-untyped-def]
    file: Path, measures: dict[str, str] | None = None, pathogens: tuple[str, ...] | None = None,
):
    """The ruleset in ``file``, its indicators checked against the registry of indicator kinds
    (on the standard measures and ``measures``; qualified measures' pathogens against
    ``pathogens``); every problem printed as ``file:line:col: path: message``."""
    from server.services.indicator_kinds import indicator_check

    if not file.is_file():
        raise fail(f"{file}: no such file")
    try:
        return load_ruleset(file, indicators=indicator_check(measures, pathogens=pathogens))
    except RulesetError as exc:
        for problem in exc.errors:
            err_console.print(escape(problem.location()), highlight=False, soft_wrap=True)
        raise typer.Exit(code=1) from None


@rules_app.command("check")
@friendly_errors
def rules_check(
    file: Annotated[Path, typer.Argument(help="Ruleset YAML file.")],
    store: Annotated[
        bool, typer.Option("--store", help="Also accept the measures of the configured "
                           "database's catalogue (TIERWISE_DATABASE_URL).")
    ] = False,
) -> None:
    """Validate a ruleset file and print its summary (tiers, thresholds, timing, signals).

    Each indicator's kind, measure and parameters are checked against the registry of
    indicator kinds (`tierwise rules kinds`), a pathogen-specific measure's pathogen against
    the feeds file's `pathogens` (TIERWISE_FEEDS_FILE; default sars-cov-2, influenza, rsv).
    Exits with status 1 and one `file:line:col: key.path: message` line per problem."""
    from server.feeds.definition import DEFAULT_PATHOGENS
    from server.services.feeds import feeds_file, load_catalogue

    settings = Settings(demo_mode=True)
    pathogens = (load_catalogue(settings).pathogens if feeds_file(settings) is not None
                 else DEFAULT_PATHOGENS)
    measures = None
    if store:
        from server.services.database import Database
        from server.services.district_data import store_measures

        db = Database.from_settings(settings)
        try:
            db.check()
            with db.transaction() as session:
                measures = store_measures(session=session)
        finally:
            db.dispose()
    ruleset = _load(file, measures, pathogens)
    say(escape(summary(ruleset).rstrip()))


@rules_app.command("kinds")
@friendly_errors
def rules_kinds() -> None:
    """List the indicator kinds a policy may declare, with their measures and parameters."""
    from server.services.indicator_kinds import describe

    for line in describe():
        say(escape(line))


def _day(value: str | None, option: str) -> date | None:
    if value is None:
        return None
    try:
        return date.fromisoformat(value)
    except ValueError:
        raise fail(f"{option}: {value!r} is not a date (YYYY-MM-DD)") from None


def _summary_table(results: list) -> list[str]:  # type: ignore[type-arg]
    """Side-by-side summary lines of one or more backtest results."""
    heads = [f"{r.ruleset.name} {r.ruleset.version}" for r in results]
    rows: list[tuple[str, list[str]]] = []
    rows.append(("tier changes per region per year", [f"{r.summary.changes_per_year:.1f}"
                                                       for r in results]))
    rows.append(("tier changes per region (min-max)", [
        f"{min(x.changes for x in r.summary.regions)}-{max(x.changes for x in r.summary.regions)}"
        for r in results
    ]))
    n = max(r.ruleset.n_tiers for r in results)
    for k in range(-1, n):
        label = "days insufficient data" if k < 0 else f"days in tier {k}"
        cells = []
        for r in results:
            shares = r.summary.tier_shares
            cells.append(f"{100 * shares[k + 1]:.1f}%" if k + 1 < len(shares) else "-")
        rows.append((label, cells))
    rows.append(("escalations", [str(r.summary.escalations) for r in results]))
    rows.append(("escalations preceded by a prepare signal", [
        "-" if r.summary.escalations == 0 else f"{100 * r.summary.preceded_share:.0f}%"
        for r in results
    ]))
    rows.append(("median lead of prepare signals (days)", [
        "-" if not r.summary.leads else f"{r.summary.median_lead:g}" for r in results
    ]))
    rows.append(("prepare episodes without escalation", [
        f"{sum(x.unfollowed for x in r.summary.regions)} of "
        f"{sum(x.episodes for x in r.summary.regions)}" for r in results
    ]))
    width = max(len(label) for label, _ in rows)
    cols = [max(len(h), *(len(c[i]) for _, c in rows)) for i, h in enumerate(heads)]
    out = ["  ".join([" " * width, *(h.rjust(w) for h, w in zip(heads, cols, strict=True))])]
    for label, cells in rows:
        out.append("  ".join([label.ljust(width),
                              *(c.rjust(w) for c, w in zip(cells, cols, strict=True))]))
    return out


@friendly_errors
def backtest_command(
    rules: Annotated[Path, typer.Option("--rules", help="Ruleset YAML file to replay.")],
    from_: Annotated[
        str | None, typer.Option("--from", help="First day summarised (YYYY-MM-DD).")
    ] = None,
    to: Annotated[
        str | None, typer.Option("--to", help="Last day summarised (YYYY-MM-DD).")
    ] = None,
    as_known: Annotated[
        bool,
        typer.Option("--as-known", help="Judge each day on the data as known that day (vintages)."),
    ] = False,
    compare: Annotated[
        Path | None, typer.Option("--compare", help="A second ruleset shown side by side.")
    ] = None,
    output: Annotated[
        Path | None, typer.Option("--output", help="Folder for per-region tier timelines (CSV).")
    ] = None,
    nowcast: Annotated[
        bool,
        typer.Option("--nowcast-accuracy/--no-nowcast-accuracy",
                     help="Score each past morning's nowcast of the last 7 days against the "
                     "count known four weeks later."),
    ] = True,
    forecasts: Annotated[
        bool,
        typer.Option("--forecast-record/--no-forecast-record",
                     help="With --as-known: make each past morning's forecasts from the data "
                     "known that morning and score them against the outcomes known now."),
    ] = True,
) -> None:
    """Replay a ruleset over the stored history and summarise it: tier changes per region per
    year, days in each tier, prepare signals and their lead before the next escalation."""
    from server.services.backtest import data_span, run_backtest, write_timelines
    from server.services.capacity_leads import capacity_leads
    from server.services.database import Database
    from server.services.nowcast_scores import nowcast_accuracy_report

    rulesets = [_load(rules)] + ([_load(compare)] if compare is not None else [])
    start, end = _day(from_, "--from"), _day(to, "--to")
    settings = Settings(demo_mode=True)
    db = Database.from_settings(settings)
    results = []
    scores = []
    record: list = []  # type: ignore[type-arg]
    leads: list = []  # type: ignore[type-arg]
    try:
        db.check()
        for rs in rulesets:
            with db.transaction() as session:
                first, last = data_span(session=session)
                total = ((end or last) - first).days + 1
                label = f"replaying {rs.name}{' as known' if as_known else ''}"
                with progress_bar(label, total=total) as advance:
                    results.append(
                        run_backtest(
                            session=session, ruleset=rs, start=start, end=end,
                            as_known=as_known, progress=advance, time_zone=settings.zone,
                        )
                    )
                leads.append(capacity_leads(session=session, result=results[-1]))
        if nowcast:
            with db.transaction() as session:
                scores = nowcast_accuracy_report(session=session, time_zone=settings.zone)
        if forecasts and as_known:
            from server.services.forecast_record import (
                forecast_record_as_known,
            )

            with db.transaction() as session:
                record = forecast_record_as_known(
                    session=session, forecaster=None, time_zone=settings.zone,
                    start=start, end=end)
    finally:
        db.dispose()
    first_result = results[0]
    mode = "data as known each day" if as_known else "latest data"
    say(
        f"Backtest {first_result.start} to {first_result.end} on {mode}, "
        f"{len(first_result.evaluation.regions)} districts "
        f"({', '.join(f'{r.seconds:.1f} s' for r in results)})"
    )
    for line in _summary_table(results):
        say(escape(line))
    for line in _lead_lines(results, leads):
        say(escape(line))
    for line in _nowcast_lines(scores):
        say(escape(line))
    for line in _forecast_lines(record):
        say(escape(line))
    if output is not None:
        for i, r in enumerate(results):
            same = i > 0 and r.ruleset.name == rulesets[0].name
            stem = f"{r.ruleset.name}-compare" if same else r.ruleset.name
            path = write_timelines(r, output, stem=stem)
            say(f"timelines: {path}")
        _per_region(results, output)
        say(f"capacity leads: {_leads_csv(results, leads, output)}")
        if record:
            say(f"forecast record: {_forecast_csv(record, output)}")


def _lead_lines(results: list, leads: list) -> list[str]:  # type: ignore[type-arg]
    """Per ruleset, capacity prepare signal and area: how many days ahead of each real crossing
    of the configured ICU share the signal fired."""
    out: list[str] = []
    for r, items in zip(results, leads, strict=True):
        if not items:
            continue
        out += ["", f"Capacity prepare signals of {r.ruleset.name} (days ahead of the day the "
                "area's ICU share, as known now, reached the share the indicator projects to):"]
        for x in items:
            name = r.names.get(x.area, x.area)
            when = (f"fired {x.fired}, {x.lead_days} days ahead" if x.fired is not None
                    else "did not fire before it")
            out.append(f"  {x.signal}, {name} ({x.area}): reached {x.share:g} % on "
                       f"{x.crossed}; {when}")
    return out


def _leads_csv(results: list, leads: list, output: Path) -> Path:  # type: ignore[type-arg]
    """The capacity leads of every ruleset as CSV (``fired`` and ``lead_days`` empty: none)."""
    lines = ["ruleset,signal,area,share,crossed,fired,lead_days"]
    for r, items in zip(results, leads, strict=True):
        for x in items:
            lines.append(",".join([
                r.ruleset.name, x.signal, x.area, f"{x.share:g}", x.crossed.isoformat(),
                "" if x.fired is None else x.fired.isoformat(),
                "" if x.lead_days is None else str(x.lead_days)]))
    path = output / "capacity_leads.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _nowcast_lines(scores: list) -> list[str]:  # type: ignore[type-arg]
    """The nowcast-accuracy section: all districts, then each district, per measure."""
    if not scores:
        return []
    out = ["", "Nowcast accuracy (each morning's last 7 days against the count known 28 days "
           "later; error = median absolute relative error):"]
    for s in scores:
        if s.region is None:
            out.append(f"  {s.measure}, all districts: {s.line}")
        elif s.mornings:
            out.append(f"    {s.region}: {s.line.split(': ', 1)[1]}")
    return out


#: Horizons (days) of the forecast record printed by ``tierwise backtest``.
SHOWN_HORIZONS = (1, 3, 7, 14, 21)


def _forecast_lines(cells: list) -> list[str]:  # type: ignore[type-arg]
    """The forecast-record section: all regions pooled, per target, scenario and horizon."""
    pooled = [c for c in cells if c.region is None and c.horizon in SHOWN_HORIZONS]
    if not pooled:
        return []
    out = ["", "Forecast record (each morning's forecasts from the data known that morning, "
           "against the values known now, the last 7 days left to settle; WIS relative to the "
           "error of last week's mean; "
           "every horizon and region in forecast_record.csv with --output):",
           "  target, scenario, horizon: forecasts, 50 % band, 90 % band, mean WIS, "
           "relative WIS"]
    for c in pooled:
        if c.forecasts == 0:
            out.append(f"  {c.target}, {c.scenario}, {c.horizon} d: no outcome yet")
            continue
        out.append(
            f"  {c.target}, {c.scenario}, {c.horizon} d: {c.forecasts}, "
            f"{100 * c.coverage_50:.0f} %, {100 * c.coverage_90:.0f} %, {c.mean_wis:.3g}, "
            f"{c.relative_wis:.2f}")
    return out


def _forecast_csv(cells: list, output: Path) -> Path:  # type: ignore[type-arg]
    """Every cell of the forecast record as CSV (``region`` empty: all regions pooled)."""
    lines = ["target,scenario,region,horizon,forecasts,inside_50,inside_90,coverage_50,"
             "coverage_90,mean_wis,naive_error,relative_wis"]
    for c in cells:
        lines.append(",".join([
            c.target, c.scenario, c.region or "", str(c.horizon), str(c.forecasts),
            str(c.inside_50), str(c.inside_90),
            *("" if x != x else repr(x) for x in (c.coverage_50, c.coverage_90, c.mean_wis,
                                                  c.naive_error, c.relative_wis)),
        ]))
    path = output / "forecast_record.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _per_region(results: list, output: Path) -> None:  # type: ignore[type-arg]
    """Write the per-region summary (changes, days per tier, leads) of each result as CSV."""
    lines = ["ruleset,region,changes,changes_per_year,escalations,preceded,leads,"
             + ",".join(["days_insufficient"] + [f"days_tier_{k}" for k in
                                                 range(results[0].ruleset.n_tiers)])]
    for r in results:
        years = r.summary.days / 365.25
        for x in r.summary.regions:
            lines.append(",".join([
                r.ruleset.name, x.region, str(x.changes), f"{x.changes / years:.2f}",
                str(x.escalations), str(x.preceded), " ".join(map(str, x.leads)),
                *map(str, x.days_in_tier),
            ]))
    path = output / "summary.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    say(f"summary: {path}")


@friendly_errors
def evaluate_command(
    cutoff: Annotated[
        str | None,
        typer.Option(help="Data cutoff, ISO time stamp (default: the newest vintage)."),
    ] = None,
    policy: Annotated[
        str | None,
        typer.Option("--policy", help="The active policy (ruleset name) to evaluate "
                                      "(default: every active policy)."),
    ] = None,
) -> None:
    """Evaluate the active rulesets (every active policy, or ``--policy``) for the regions of
    each policy's level (districts, areas or the county) on the data as known at the cutoff and
    store the assessments (a second run with the same cutoff reuses them)."""
    from server.cli.feeds import configured_catalogue
    from server.services.database import Database
    from server.services.evaluation import evaluate_districts
    from server.services.feeds import catalogue_limits
    from server.services.notify import notify_config_from
    from server.services.rulesets import active_rulesets, require_policy

    when = None
    if cutoff is not None:
        try:
            when = datetime.fromisoformat(cutoff)
        except ValueError:
            raise fail(f"--cutoff: {cutoff!r} is not an ISO time stamp") from None
        if when.tzinfo is None:
            raise fail(f"--cutoff: {cutoff!r} needs a time zone (e.g. +00:00)")
        if when > datetime.now(UTC):
            # a run there would stand for data that have not arrived yet
            raise fail(f"--cutoff: {cutoff!r} is in the future")
    settings = Settings(demo_mode=True)
    notify = notify_config_from(settings.notify_file)  # None unless TIERWISE_NOTIFY_FILE is set
    limits = catalogue_limits(configured_catalogue(settings))
    db = Database.from_settings(settings)
    try:
        db.check()
        with db.transaction() as session:
            chosen = require_policy(session=session, policy=policy)
            rows = [chosen] if policy is not None and chosen is not None else active_rulesets(
                session=session)
            if not rows:
                raise fail("no active ruleset; the demo or `tierwise rules` must store one first")
            runs = [evaluate_districts(session=session, ruleset_row=row, cutoff=when,
                                       notify=notify, stale_after=limits) for row in rows]
    finally:
        db.dispose()
    if all(run is None for run in runs):
        raise fail("no data known at that cutoff")
    for run in runs:
        if run is None:
            continue
        verb = "reused" if run.reused else "stored"
        say(
            f"{run.ruleset_name}: {verb} assessments {run.start} to {run.end} "
            f"(cutoff {run.data_cutoff.isoformat()}, {run.written:,} written)"
        )
        for d in run.notified:
            say(f"notified {d.recipient}: {d.events} event(s)" if d.ok
                else f"notification to {d.recipient} failed: {d.error}")
