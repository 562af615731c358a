"""``tierwise effects``: did it work? Change points in transmission and changes in testing."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer
from rich.markup import escape

from server.cli.output import fail, friendly_errors, say
from server.services.effects import (
    KERNEL_LOCAL_WINDOW,
    KERNEL_MIN_CHANGE,
    BreakOptions,
    EffectsTable,
    breaks_table,
    effects_csv,
    levels_table,
    testing_table,
)

effects_app = typer.Typer(
    help="Did it work? Breaks in transmission and changes in testing, from a daily CSV file.",
    no_args_is_help=True,
)

Output = Annotated[str, typer.Option("--output", "-o", help="CSV to write, - for stdout.")]
MinSegment = Annotated[int, typer.Option(min=7, help="Fewest days between breaks.")]
MaxBreaks = Annotated[int | None, typer.Option(min=0, help="Most breaks (default: up to 10).")]
Penalty = Annotated[float, typer.Option(help="Multiplier of the BIC penalty (1 = BIC).")]
Level = Annotated[float, typer.Option(help="Interval level.")]
MinChange = Annotated[float, typer.Option(
    min=0.0, help="Smallest relative change of R reported as a break (0.1: R after / R "
                  "before at least 1.1 or at most 1/1.1).")]


def _emit(table: EffectsTable, output: str) -> None:
    if output == "-":
        say(escape(effects_csv(table).rstrip("\n")))
        return
    if not output:
        raise fail("--output: give a file name or - for stdout")
    from server.services.effects import write_effects

    write_effects(table, Path(output))
    say(f"{table.kind}: {len(table.rows)} rows written to {output}")


@effects_app.command("breaks")
@friendly_errors
def breaks_command(
    file: Annotated[Path, typer.Argument(help="Daily CSV with columns date, cases.")],
    output: Output = "-",
    min_segment: MinSegment = 14,
    max_breaks: MaxBreaks = None,
    penalty: Penalty = 1.0,
    level: Level = 0.95,
    dispersion: Annotated[str, typer.Option(help="quasipoisson or poisson.")] = "quasipoisson",
    si_mean: Annotated[float, typer.Option(help="Generation interval mean, days.")] = 4.7,
    si_sd: Annotated[float, typer.Option(help="Generation interval SD, days.")] = 2.9,
    shape: Annotated[str, typer.Option(help="kink (continuous) or step.")] = "kink",
    infection_delay: Annotated[float | None, typer.Option(
        help="Mean days from infection to the cases' date (gives transmission dates).")] = None,
    delay_sd: Annotated[float | None, typer.Option(
        help="SD of the infection-to-report delay, days (default 0.4 x --infection-delay).")
    ] = None,
    smoothing: Annotated[bool | None, typer.Option(
        "--smoothing/--no-smoothing",
        help="Kinks smoothed by the generation interval and the delay (default: on with "
             "--infection-delay).")] = None,
    population: Annotated[float | None, typer.Option(
        help="Population: with tests and positives columns, testing changes become level "
             "shifts of cases.")] = None,
    min_change: MinChange = KERNEL_MIN_CHANGE,
    column: Annotated[str, typer.Option(
        help="Column of daily counts searched (e.g. admissions).")] = "cases",
    local_window: Annotated[int, typer.Option(
        help="Kink model: days either side of a break over which its growth_change is "
             "measured (0: the whole adjacent segments).")] = KERNEL_LOCAL_WINDOW,
) -> None:
    """Changes in the growth of daily cases, and each segment's growth rate, doubling time and R.

    --column searches another column of counts (hospital admissions). --min-change
    (kink model): a break must change R by at least this share.

    Model (--shape kink): log E[cases] is one continuous line whose slope changes at
    each break, plus weekday effects, quasi-Poisson; with --population and columns
    tests, positives, flagged testing changes enter as level shifts. Breaks by forward
    selection, their number by a quasi-likelihood BIC, their dates by profile likelihood.
    (--shape step: a separate line per segment, level and slope both jump.) One row per
    segment; the break that opens a segment is on its row (break_lower/break_upper:
    profile interval of its date; growth_change: the change of slope at the break). R from the
    growth rate for a gamma generation interval (Wallinga & Lipsitch 2007). With
    --infection-delay, transmission_date = break - delay + E[T^2]/(2 E[T]) (T the
    generation interval): the day transmission changed; the kinks are then smoothed by
    the generation interval and a gamma delay (--delay-sd; --no-smoothing for plain kinks).
    growth_change compares the growth near the break (the fit again with fixed knots
    --local-window days either side, where the segment reaches further), not the whole
    segments' averages.
    """
    options = BreakOptions(min_segment=min_segment, max_breaks=max_breaks, penalty=penalty,
                           level=level, dispersion=dispersion.lower(), si_mean=si_mean,
                           si_sd=si_sd, shape=shape.lower(), infection_delay=infection_delay,
                           delay_sd=delay_sd, smoothing=smoothing, population=population,
                           min_change=min_change, column=column,
                           local_window=local_window or None)
    _emit(breaks_table(file, options), output)


@effects_app.command("levels")
@friendly_errors
def levels_command(
    file: Annotated[Path, typer.Argument(help="Daily CSV with columns date and --column.")],
    column: Annotated[str, typer.Option(
        help="Column of positive values (a wastewater concentration).")] = "concentration",
    output: Output = "-",
    min_segment: MinSegment = 14,
    max_breaks: MaxBreaks = None,
    penalty: Penalty = 1.0,
    level: Level = 0.95,
    si_mean: Annotated[float, typer.Option(help="Generation interval mean, days.")] = 4.7,
    si_sd: Annotated[float, typer.Option(help="Generation interval SD, days.")] = 2.9,
    min_change: MinChange = KERNEL_MIN_CHANGE,
) -> None:
    """Changes in the growth of a continuous signal (wastewater concentration).

    Model: log value is one continuous line whose slope changes at each break, with
    independent normal errors, fitted by least squares on the days with a value
    (samples); breaks by forward selection, their number by the BIC, their dates'
    intervals by profile likelihood. One row per segment, as `effects breaks`.
    """
    options = BreakOptions(min_segment=min_segment, max_breaks=max_breaks, penalty=penalty,
                           level=level, si_mean=si_mean, si_sd=si_sd, min_change=min_change,
                           column=column)
    _emit(levels_table(file, options), output)


@effects_app.command("testing")
@friendly_errors
def testing_command(
    file: Annotated[Path, typer.Argument(help="Daily CSV with columns date, tests, positives.")],
    population: Annotated[float, typer.Option(help="Population (tests per 100 000).")],
    output: Output = "-",
    min_segment: MinSegment = 14,
    max_breaks: MaxBreaks = None,
    penalty: Penalty = 1.0,
    level: Level = 0.95,
    compare: Annotated[int, typer.Option(min=1, help="Days compared on each side.")] = 7,
    min_ratio: Annotated[float, typer.Option(help="Smallest factor of tests flagged.")] = 1.2,
) -> None:
    """Level shifts in testing, flagged when positivity moves the other way.

    One row per break in daily tests: tests per 100 000 over the --compare days
    before and from the break, their ratio, positivity before and after and its odds
    ratio, and testing_change = true when tests moved by at least --min-ratio and
    positivity significantly the other way (wider or narrower testing, which moves
    case counts on its own).
    """
    options = BreakOptions(min_segment=min_segment, max_breaks=max_breaks, penalty=penalty,
                           level=level, population=population, compare=compare,
                           min_ratio=min_ratio)
    _emit(testing_table(file, options), output)
