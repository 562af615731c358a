"""``tierwise estimate KIND``: one indicator for a daily CSV file, written as a daily CSV file."""

from __future__ import annotations

from enum import StrEnum
from pathlib import Path
from typing import Annotated

import typer
from rich.markup import escape

from server.cli.output import fail, friendly_errors, say, warn
from server.services.estimate_csv import estimates_csv, write_estimates
from server.services.estimates import KINDS, EstimateOptions, registry_kinds, run_estimate

#: The indicators ``tierwise estimate`` computes: its own tables, then every other kind of the
#: policy registry (``tierwise rules kinds``).
Kind = StrEnum("Kind", {k.replace("-", "_"): k for k in (*KINDS, *registry_kinds())})  # type: ignore[misc]


HELP = """Compute one indicator for a daily CSV file.

The input needs a `date` column (YYYY-MM-DD, any row order, each date
once) and the KIND's value columns. Dates between the first and the last
that the file leaves out, and empty cells, are missing (never zero). The
output has a `date` column and one row per date of that range; a cell is
empty where no estimate exists. Intervals are 95 % unless --level says.

\b
KIND: input columns -> output columns
rt: cases -> r_mean, r_lower, r_upper, r_cv
incidence: cases -> rate, rate_lower, rate_upper (per 100 000)
positivity: positives, tests -> positivity, positivity_lower,
  positivity_upper (fractions)
aberration: cases -> expected, upper, alarm (true/false)
growth: cases -> growth_rate, growth_rate_lower, growth_rate_upper,
  doubling_time, doubling_time_lower, doubling_time_upper
wastewater: concentration (flow, marker) -> log_value, smoothed,
  trend, trend_lower, trend_upper, level
icu-projection: admissions, occupied, staffed -> admissions_level,
  occupied_projected, occupied_lower, occupied_upper, share_projected,
  share_lower, share_upper, days_to_threshold,
  days_to_threshold_lower, days_to_threshold_upper
curve-fit: cases -> cumulative, fitted_cumulative, fitted_daily,
  final_size, final_size_lower, final_size_upper,
  projected_cumulative, projected_lower, projected_upper
nowcast: d0, d1, ..., dD -> nowcast, nowcast_lower, nowcast_upper,
  known, reported_share
seasonal-intensity: cases -> weekly_value, epidemic_threshold,
  medium_threshold, high_threshold, very_high_threshold, level,
  seasons, not_enough_seasons (true/false)
testing_rate, growth_rate, occupancy_share, wastewater_trend,
  wastewater_level (and every other policy kind, `tierwise rules
  kinds`): the measure's column (--measure, default the kind's own,
  e.g. tests) and its measure parameters' columns -> value, lower,
  upper, count, computed as a policy's indicator; --param NAME=VALUE
  as the policy's params; --population (the people a plant serves for
  the wastewater kinds)

\b
rt: Cori et al. (2013) posterior over --window days (7), dated on the
  window's last day, equal to EpiEstim's estimate_R. Needs --si-mean
  and --si-sd (gamma serial interval) or --si-file (CSV with columns
  k, p). Estimates start where EpiEstim starts them: windows from the
  second day, ending after the serial interval's mean.
  --overdispersion quasi-poisson widens the interval by the window's
  Pearson dispersion.
incidence: trailing --window (7) sum per 100 000 of --population,
  exact Poisson (Garwood) bounds.
positivity: trailing --window (7) positives / tests, Wilson bounds.
aberration: --method c1, c2, c3 (EARS, daily) or farrington (improved
  Farrington, weekly). Farrington sums days into --week-system iso
  (Mon-Sun) or cdc (Sun-Sat) weeks; a week with a missing day, or cut
  by either end of the file, is a missing week. Each week's result is
  written on its last day (Sunday or Saturday); other rows stay empty.
  It needs more than 2 years of weeks.
growth: log-linear quasi-Poisson fit over the trailing --window (14)
  days with weekday effects; r per day; doubling time ln2/|r| in days
  (a halving time when r < 0; upper bound inf when the interval of r
  contains 0).
wastewater: natural log of the --normalise none|flow|marker
  concentration on sample days; local linear smooth over --neighbours
  (5) samples; trend = % change per day from a log-linear fit over
  --window (15) days; level = SDs of the smooth above the 10th
  percentile of the last --baseline-days (365) of samples.
icu-projection: for each date, ICU beds in use --horizon (14) days
  ahead, from that date's 7-day mean admissions, their growth rate
  over --growth-window (14) days (the bounds use the growth interval),
  today's beds in use and a length of stay (median 8, quartiles 5 and
  13 days); share of staffed beds; days until --threshold (0.8) of
  staffed beds is reached (inf: not within the horizon; lower bound =
  earliest day).
curve-fit: logistic (or --model richards) fitted to all rows; final
  size and cumulative count --horizon (7) days after the last date,
  with bootstrap intervals, on the last row only. Before the fitted
  turning point the final size is a lower bound (upper bound left
  empty, a warning on stderr): such fits underestimate it.
nowcast: d0..dD hold the cumulative count of each date known d days
  later (empty where not yet known; --increments when they hold the
  counts first reported at each delay); chain-ladder estimate of the
  final count with its interval, the latest known count and the share
  of the final count already reported.
seasonal-intensity: moving epidemic method (Vega et al. 2013, 2015).
  Daily counts are summed into ISO weeks (a week with a missing day
  is missing), each week written on its Sunday; with --weekly each row
  is one ISO week's count. --population gives rates per 100 000.
  Seasons run from ISO week --start-week (40) to --end-week (20); a
  week is judged against the last --seasons (10) seasons ended before
  it; level 0 below the epidemic threshold, 1 low, 2 medium, 3 high,
  4 very high; empty with not_enough_seasons true under
  --min-seasons (3). --interval mean (as published) or point (the mem
  package's defaults).
"""


def estimate(
    kind: Annotated[Kind, typer.Argument(help="Which indicator (see the table above).")],
    input: Annotated[Path, typer.Option("--input", "-i", help="Daily CSV file to read.")],
    output: Annotated[
        str, typer.Option("--output", "-o", help="CSV to write, - for stdout.")
    ] = "-",
    window: Annotated[int | None, typer.Option(help="Window in days (default per KIND).")] = None,
    level: Annotated[float, typer.Option(help="Interval level.")] = 0.95,
    max_missing: Annotated[
        int, typer.Option(help="incidence/positivity/growth: missing days a window may hold.")
    ] = 0,
    si_mean: Annotated[float | None, typer.Option(help="rt: serial interval mean, days.")] = None,
    si_sd: Annotated[float | None, typer.Option(help="rt: serial interval SD, days.")] = None,
    si_file: Annotated[Path | None, typer.Option(help="rt: CSV `k,p` serial interval.")] = None,
    prior_mean: Annotated[float, typer.Option(help="rt: prior mean of R.")] = 5.0,
    prior_sd: Annotated[float, typer.Option(help="rt: prior SD of R.")] = 5.0,
    overdispersion: Annotated[
        str, typer.Option(help="rt: none (Poisson, as EpiEstim) or quasi-poisson.")
    ] = "none",
    population: Annotated[float | None, typer.Option(help="incidence: population.")] = None,
    method: Annotated[str, typer.Option(help="aberration: c1, c2, c3 or farrington.")] = "c1",
    week_system: Annotated[str, typer.Option(help="aberration farrington: iso or cdc.")] = "iso",
    years_back: Annotated[int, typer.Option(help="aberration farrington: years of history.")] = 5,
    day_of_week: Annotated[
        bool | None,
        typer.Option("--day-of-week/--no-day-of-week",
                     help="growth (default on), icu-projection (default off): weekday effects."),
    ] = None,
    normalise: Annotated[str, typer.Option(help="wastewater: none, flow or marker.")] = "none",
    population_served: Annotated[
        float | None, typer.Option(help="wastewater flow: people served.")
    ] = None,
    neighbours: Annotated[int, typer.Option(help="wastewater: samples per local fit.")] = 5,
    baseline_days: Annotated[int, typer.Option(help="wastewater: baseline period, days.")] = 365,
    quantile: Annotated[float, typer.Option(help="wastewater: baseline quantile.")] = 0.10,
    min_samples: Annotated[int, typer.Option(help="wastewater: baseline samples needed.")] = 10,
    horizon: Annotated[
        int | None, typer.Option(help="icu-projection (14), curve-fit (7): days ahead.")
    ] = None,
    growth_window: Annotated[int, typer.Option(help="icu-projection: growth window.")] = 14,
    threshold: Annotated[float, typer.Option(help="icu-projection: share of beds.")] = 0.8,
    los_median: Annotated[float, typer.Option(help="icu-projection: median stay.")] = 8.0,
    los_q1: Annotated[float, typer.Option(help="icu-projection: lower quartile of stay.")] = 5.0,
    los_q3: Annotated[float, typer.Option(help="icu-projection: upper quartile of stay.")] = 13.0,
    model: Annotated[str, typer.Option(help="curve-fit: logistic or richards.")] = "logistic",
    n_boot: Annotated[int, typer.Option(help="curve-fit: bootstrap draws.")] = 200,
    seed: Annotated[int, typer.Option(help="curve-fit: bootstrap seed.")] = 0,
    increments: Annotated[bool, typer.Option(help="nowcast: d-columns are increments.")] = False,
    delay_window: Annotated[
        int | None, typer.Option(help="nowcast: recent dates used for the delays.")
    ] = None,
    weekly: Annotated[bool, typer.Option(help="seasonal-intensity: rows are weeks.")] = False,
    start_week: Annotated[int, typer.Option(help="seasonal-intensity: first ISO week.")] = 40,
    end_week: Annotated[int, typer.Option(help="seasonal-intensity: last ISO week.")] = 20,
    seasons: Annotated[int, typer.Option(help="seasonal-intensity: past seasons pooled.")] = 10,
    min_seasons: Annotated[
        int, typer.Option(help="seasonal-intensity: past seasons needed.")
    ] = 3,
    interval: Annotated[str, typer.Option(help="seasonal-intensity: mean or point.")] = "mean",
    measure: Annotated[
        str | None, typer.Option(help="policy kinds: the measure (column) to read.")
    ] = None,
    param: Annotated[
        list[str] | None, typer.Option(help="policy kinds: NAME=VALUE, as in a policy.")
    ] = None,
) -> None:
    options = EstimateOptions(
        window=window, level=level, max_missing=max_missing, si_mean=si_mean, si_sd=si_sd,
        si_file=si_file, prior_mean=prior_mean, prior_sd=prior_sd, population=population,
        method=method.lower(), week_system=week_system.lower(), years_back=years_back,
        day_of_week=day_of_week, normalise=normalise.lower(), population_served=population_served,
        neighbours=neighbours, baseline_days=baseline_days, quantile=quantile,
        min_samples=min_samples, horizon=horizon, growth_window=growth_window,
        threshold=threshold, los_median=los_median, los_quartiles=(los_q1, los_q3), model=model,
        n_boot=n_boot, seed=seed, increments=increments, delay_window=delay_window,
        overdispersion=overdispersion.lower(), weekly=weekly, start_week=start_week,
        end_week=end_week, seasons=seasons, min_seasons=min_seasons, interval=interval.lower(),
        measure=measure, params=tuple(param or ()),
    )
    table = run_estimate(kind.value, input, options)
    for text in table.warnings:
        warn(text)
    if output == "-":
        say(escape(estimates_csv(table).rstrip("\n")))
        return
    if not output:
        raise fail("--output: give a file name or - for stdout")
    write_estimates(table, Path(output))
    say(f"{kind.value}: {len(table.dates)} rows written to {output}")


estimate.__doc__ = HELP
estimate_command = friendly_errors(estimate)
