"""Ingest benchmark: a long CSV of 2 million rows into SQLite and PostgreSQL, against pandas.

Generates a long CSV (``region,date,measure,value``) of ``--regions`` x ``--days`` rows (3 000 x 667
= 2 001 000 by default, one measure), then times a plain ``pandas.read_csv`` of the file and a full
``tierwise`` ingest of it (streamed parse, every row check, one vintage in one transaction: binary
COPY on PostgreSQL, executemany on SQLite). Prints rows per second and the ratio ingest / read_csv.
Target: at least 100 000 rows/s, i.e. within 10x of parsing alone.

    python bench/ingest.py [--regions 3000] [--days 667] [--postgres URL] [--revise]

``--revise`` then ingests a second file of the same keys with other values, so that nearly every
row revises a stored value (each compared with the current value first,
``server/services/revisions.py``), and prints its time against the first ingest's.

``--postgres`` must name a scratch database; the benchmark works in a schema of its own and drops
it at the end. Without it only SQLite (a temporary file) is measured.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from datetime import UTC, date, datetime
from pathlib import Path

import numpy as np
import pandas as pd

from server.feeds.definition import parse_feeds
from server.feeds.sources import Payload
from server.services.database import Database
from server.services.ingest import ingest_payload
from server.store import (
    MeasureRecord,
    RegionRecord,
    make_sessionmaker,
    scratch_engine,
    upgrade,
    upsert_measures,
    upsert_regions,
)

FEED = parse_feeds("feeds:\n  - name: bench\n    source: {kind: push}\n    measures:\n"
                   "      cases: {min: 0, max: 1000000}\n", source="bench")["bench"]


def write_csv(path: Path, regions: int, days: int, seed: int = 5) -> int:
    rng = np.random.default_rng(seed)
    codes = np.asarray([f"B{i:05d}" for i in range(regions)])
    dates = (np.datetime64("2024-01-01") + np.arange(days)).astype(str)
    with path.open("w") as out:
        out.write("region,date,measure,value\n")
        for d in dates:
            values = rng.poisson(20, size=regions)
            out.write("".join(f"{c},{d},cases,{v}\n" for c, v in zip(codes, values, strict=True)))
    return regions * days


def ingest_rate(
    url: str, path: Path, regions: int, again: Path | None = None
) -> tuple[float, int, float | None, int]:
    with scratch_engine(url, prefix="tw_bench") as engine:
        upgrade(engine)
        db = Database(engine=engine, sessions=make_sessionmaker(engine))
        with db.transaction() as session:
            upsert_regions(session=session, records=[
                RegionRecord(code=f"B{i:05d}", name=f"Bench {i}", level="district", parent=None,
                             population=1000) for i in range(regions)])
            upsert_measures(session=session, records=[
                MeasureRecord(name="cases", unit="n", kind="count", aggregation="sum")])
        start = time.perf_counter()
        with db.transaction() as session:
            receipt = ingest_payload(
                session=session, feed=FEED, payload=Payload.from_path(path),
                received_at=datetime.now(UTC), today=date.today())
        first = time.perf_counter() - start
        if again is None:
            return first, receipt.rows_accepted, None, 0
        start = time.perf_counter()
        with db.transaction() as session:
            second = ingest_payload(
                session=session, feed=FEED, payload=Payload.from_path(again),
                received_at=datetime.now(UTC), today=date.today())
        return first, receipt.rows_accepted, time.perf_counter() - start, second.revised


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--regions", type=int, default=3000)
    parser.add_argument("--days", type=int, default=667)
    parser.add_argument("--postgres", default=None, help="scratch PostgreSQL URL")
    parser.add_argument("--revise", action="store_true",
                        help="then ingest a file revising nearly every value")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "long.csv"
        rows = write_csv(path, args.regions, args.days)
        size = path.stat().st_size / 1e6
        start = time.perf_counter()
        frame = pd.read_csv(path)
        parse = time.perf_counter() - start
        assert len(frame) == rows
        del frame
        print(f"{rows:,} rows, {size:.0f} MB; pandas.read_csv {parse:.2f} s "
              f"({rows / parse:,.0f} rows/s)")
        targets = [("sqlite", f"sqlite:///{Path(tmp) / 'bench.db'}")]
        if args.postgres:
            targets.append(("postgresql", args.postgres))
        again = None
        if args.revise:
            again = Path(tmp) / "revised.csv"
            write_csv(again, args.regions, args.days, seed=6)
        for name, url in targets:
            seconds, accepted, second, revised = ingest_rate(url, path, args.regions, again)
            assert accepted == rows, (accepted, rows)
            print(f"{name:>10}: ingest {seconds:.2f} s, {rows / seconds:,.0f} rows/s, "
                  f"{seconds / parse:.1f}x read_csv")
            if second is not None:
                print(f"{name:>10}: revising ingest {second:.2f} s ({revised:,} revised), "
                      f"{second / seconds:.2f}x the first ingest")


if __name__ == "__main__":
    main()
