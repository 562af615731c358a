"""Store benchmark: bulk vintage append and dense as-of read, as ratios to in-memory baselines.

Prints rows per second for appending one large vintage and for reading it back as dense
(regions x days) arrays, and the ratio of each to a pandas operation on the same rows measured in
the same run (writing the frame to CSV in memory; pivoting the frame to the same dense array).
Ratios compare like with like on a noisy machine; absolute times are for orientation only.

    python bench/store.py [--regions 500] [--days 365] [--url URL]

On PostgreSQL (``--url``) the benchmark works in a schema of its own and drops it at the end.
"""

from __future__ import annotations

import argparse
import io
import tempfile
import time
from datetime import UTC, date, datetime
from pathlib import Path

import numpy as np
import pandas as pd

from server.services.database import Database
from server.store import (
    MeasureRecord,
    RegionRecord,
    append_vintage,
    make_sessionmaker,
    read_dense,
    scratch_engine,
    upgrade,
    upsert_measures,
    upsert_regions,
)


def timed(func):  # type: ignore[no-untyped-def]
    start = time.perf_counter()
    result = func()
    return time.perf_counter() - start, result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--regions", type=int, default=500)
    parser.add_argument("--days", type=int, default=365)
    parser.add_argument("--url", default=None, help="database URL (default: a temporary SQLite)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        url = args.url or f"sqlite:///{Path(tmp) / 'bench.db'}"
        run(url, args.regions, args.days)


def run(url: str, n_regions: int, n_days: int) -> None:
    with scratch_engine(url, prefix="tw_bench") as engine:
        upgrade(engine)
        measure(Database(engine=engine, sessions=make_sessionmaker(engine)), n_regions, n_days)


def measure(db: Database, n_regions: int, n_days: int) -> None:
    codes = [f"B{i:05d}" for i in range(n_regions)]
    start = date(2025, 1, 1)
    dates = pd.date_range(start, periods=n_days).date
    rng = np.random.default_rng(1)
    frame = pd.DataFrame(
        {
            "region": np.repeat(codes, n_days),
            "measure": "cases",
            "ref_date": np.tile(dates, n_regions),
            "value": rng.poisson(20, n_regions * n_days).astype(float),
        }
    )
    with db.transaction() as s:
        upsert_regions(
            session=s,
            records=[
                RegionRecord(code=c, name=c, level="district", parent=None, population=10_000)
                for c in codes
            ],
        )
        upsert_measures(
            session=s,
            records=[MeasureRecord(name="cases", unit="persons", kind="count", aggregation="sum")],
        )

    def write() -> None:
        with db.transaction() as s:
            append_vintage(
                session=s, feed="bench", received_at=datetime.now(UTC), rows=frame, checksum="bench"
            )

    def read() -> np.ndarray:
        with db.sessions() as s:
            return read_dense(
                session=s, measures=["cases"], start=dates[0], end=dates[-1], regions=codes
            )["cases"]

    base_write, _ = timed(lambda: frame.to_csv(io.StringIO(), index=False))
    t_write, _ = timed(write)
    base_read, pivot = timed(
        lambda: frame.pivot(index="region", columns="ref_date", values="value").to_numpy()
    )
    t_read, dense = timed(read)
    assert np.array_equal(dense, pivot)
    n = len(frame)
    print(f"backend {db.engine.dialect.name}: {n:,} rows ({n_regions} regions x {n_days} days)")
    print(f"append: {n / t_write:,.0f} rows/s; ratio to pandas to_csv {t_write / base_write:.1f}x")
    print(f"read:   {n / t_read:,.0f} rows/s; ratio to pandas pivot  {t_read / base_read:.1f}x")


if __name__ == "__main__":
    main()
