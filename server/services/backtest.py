"""Use case: replay a ruleset over stored history (backtest).

Two replays:

* **latest data**: the indicators are computed once from the current data (every revision
  applied) and the ruleset runs over the whole history;
* **as known** (the honest replay): each day ``t`` is judged on the data as known on the morning
  after it, i.e. everything received up to the end of day ``t + 1`` (:func:`as_known_cutoff`),
  read from the vintages. Days are the office's local days (``time_zone``, the setting
  ``TIERWISE_TIME_ZONE``), as ingestion judges "today": a vintage received at 23:30 local time
  counts on that local day, whatever the UTC date. The hysteresis state carries from day to
  day, so day ``t`` sees exactly what a daily evaluation on that morning would have seen.

The as-known indicators, nowcasts included, come from :mod:`server.services.as_known_replay`.
A result is scored further by :mod:`server.services.capacity_leads` (how early capacity prepare
signals fired) and written out by :func:`write_timelines`; the replay's nowcasts are scored by
:mod:`server.services.nowcast_scores`.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta, tzinfo
from pathlib import Path

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from rules import Evaluation, Ruleset, evaluate
from rules.timeline import TimelineSummary, summarise_timeline
from server.services.as_known_replay import as_known_indicators
from server.services.district_data import store_measures
from server.services.district_indicators import district_indicators
from server.services.errors import ServiceError
from server.services.indicator_kinds import measure_needs
from server.services.level_data import policy_data
from server.store.models import Measure, Observation, Region, Vintage

__all__ = [
    "BacktestError",
    "BacktestResult",
    "as_known_cutoff",
    "data_span",
    "first_known_day",
    "run_backtest",
    "write_timelines",
]


class BacktestError(ServiceError, ValueError):
    """A backtest that cannot run; names the argument."""

    def __init__(self, argument: str, message: str) -> None:
        super().__init__(f"{argument}: {message}")


@dataclass(frozen=True, kw_only=True, eq=False)
class BacktestResult:
    """A replay of one ruleset: the evaluation, the summarised period and its figures."""

    ruleset: Ruleset
    as_known: bool
    start: date
    end: date
    evaluation: Evaluation
    summary: TimelineSummary
    seconds: float
    names: dict[str, str]

    @property
    def period(self) -> slice:
        """Columns of the evaluation inside ``start..end``."""
        first = (np.datetime64(self.start, "D") - self.evaluation.dates[0]).astype(int)
        return slice(int(first), int(first) + (self.end - self.start).days + 1)


def as_known_cutoff(day: date, time_zone: tzinfo = UTC) -> datetime:
    """The data cutoff of the as-known replay for ``day``: the end of the following local day.

    The last microsecond before local midnight starting day ``day + 2`` in ``time_zone``.
    """
    midnight = datetime.combine(day + timedelta(days=2), datetime.min.time(), tzinfo=time_zone)
    return midnight - timedelta(microseconds=1)


def data_span(*, session: Session, measures: Iterable[str] | None = None) -> tuple[date, date]:
    """The first and last stored days (of ``measures`` only, when given: a policy's span is that
    of the measures it reads, so a long pathogen history does not lengthen other policies)."""
    query = select(func.min(Observation.ref_date), func.max(Observation.ref_date))
    names = None if measures is None else sorted(set(measures))
    if names:
        query = query.join(Measure, Measure.id == Observation.measure_id).where(
            Measure.name.in_(names))
    first, last = session.execute(query).one()
    if first is None:  # the first and last stored days
        raise BacktestError("database", "there are no observations to replay")
    return first, last


def first_known_day(session: Session, measures: Iterable[str], time_zone: tzinfo = UTC) -> date:
    """The first day whose as-known morning knew anything of ``measures``: the local day before
    the first vintage holding one of them arrived (:func:`as_known_cutoff` ends the next day)."""
    names = sorted(set(measures))
    held = (select(Observation.vintage_id).join(Measure, Measure.id == Observation.measure_id)
            .where(Measure.name.in_(names)))
    received = session.scalar(select(func.min(Vintage.received_at)).where(Vintage.id.in_(held)))
    if received is None:
        raise BacktestError("database", "there are no observations to replay")
    return received.astimezone(time_zone).date() - timedelta(days=1)


def run_backtest(
    *, session: Session, ruleset: Ruleset, start: date | None = None, end: date | None = None,
    as_known: bool = False, progress: Callable[[int], None] | None = None,
    lookback: int = 42, time_zone: tzinfo = UTC,
) -> BacktestResult:
    """Replay ``ruleset`` over the stored history and summarise ``start..end``.

    ``time_zone`` (the office's, ``settings.zone``) sets the local days of the as-known replay.

    The engine always starts at the first stored day (so windows and hysteresis are warmed up);
    the summary covers ``start..end`` (default: everything; as known, from the first morning that
    knew any of the policy's data, :func:`first_known_day`, so years of an archive that arrived
    later are not counted as quiet years). ``progress(n)`` is called as blocks
    of days finish (``n`` days each; the total is the number of days replayed).
    """
    t0 = time.perf_counter()
    needs = measure_needs(ruleset, store_measures(session=session))
    read = (*needs.district, *needs.area, *needs.plant)
    first, last = data_span(session=session, measures=read)
    if start is None and as_known:
        start = min(max(first, first_known_day(session, read, time_zone)), end or last)
    start, end = start or first, end or last
    if end < start:
        raise BacktestError("--to", f"{end} is before --from {start}")
    if start < first or end > last:
        raise BacktestError("--from/--to", f"stored data cover {first}..{last} only")
    tick = progress or (lambda _n: None)
    if as_known:
        data, indicators = as_known_indicators(session, ruleset, first, end, tick, time_zone)
    else:
        data = policy_data(session=session, ruleset=ruleset, start=first, end=end, as_of=None,
                           needs=needs)
        indicators = district_indicators(data, ruleset)
        tick((end - first).days + 1)
    ev = evaluate(
        ruleset, indicators, regions=data.regions, dates=data.dates, region_levels=data.levels
    )
    cols = slice((start - first).days, (end - first).days + 1)
    summary = summarise_timeline(
        ev.tier[:, cols], ev.prepare[:, :, cols], regions=data.regions,
        n_tiers=ruleset.n_tiers, lookback=lookback,
    )
    names = dict(session.execute(select(Region.code, Region.name)).all())
    return BacktestResult(
        ruleset=ruleset, as_known=as_known, start=start, end=end, evaluation=ev,
        summary=summary, seconds=time.perf_counter() - t0, names=names,
    )


def write_timelines(result: BacktestResult, directory: Path, *, stem: str | None = None) -> Path:
    """Write one CSV row per region and day of the summarised period; returns the file.

    Columns: ``date, region, name, tier, candidate, decided`` and one 0/1 column per prepare
    signal.
    """
    directory.mkdir(parents=True, exist_ok=True)
    ev, cols = result.evaluation, result.period
    rs = result.ruleset
    path = directory / f"{stem or rs.name}-{'as-known' if result.as_known else 'latest'}.csv"
    header = ["date", "region", "name", "tier", "candidate", "decided"]
    header += [f"prepare_{s.id}" for s in rs.prepare]
    lines = [",".join(header)]
    dates = ev.dates[cols]
    for r, code in enumerate(ev.regions):
        name = result.names.get(code, "").replace('"', "'")
        tier, cand, dec = ev.tier[r, cols], ev.candidate[r, cols], ev.decided[r, cols]
        sig = ev.prepare[:, r, cols].astype(int)
        for j, day in enumerate(dates):
            cells = [str(day), code, f'"{name}"', str(tier[j]), str(cand[j]), str(dec[j])]
            cells += [str(x) for x in sig[:, j]]
            lines.append(",".join(cells))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path
