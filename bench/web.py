"""Web benchmark: overview and public map at 3 000 regions; public district page requests/s.

Builds a scratch SQLite database of invented square districts with a few weeks of daily counts,
evaluates the shipped county policy, publishes every district, then measures

* the staff overview (first page, 100 rows) and the public map (all shapes): median and 95th
  percentile of the server time (in process, warm cache; the first, cold request is shown apart);
* requests per second of one public district page served by ``uvicorn --workers 2`` on loopback,
  and of a static file of the same size from the same server in the same run (ratio printed).

    python bench/web.py [--regions 3000] [--days 35] [--seconds 5] [--db FILE.db]

Absolute times depend on the machine; the ratio compares like with like.
"""

from __future__ import annotations

import sys
from pathlib import Path

# Run as a script, this file's folder comes first on sys.path and its name would shadow the
# ``web`` package; put the project root first instead.
ROOT = Path(__file__).resolve().parents[1]
if sys.path and Path(sys.path[0]).resolve() == Path(__file__).resolve().parent:
    sys.path[0] = str(ROOT)

import argparse  # noqa: E402
import asyncio  # noqa: E402
import os  # noqa: E402
import socket  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from datetime import UTC, date, datetime, timedelta  # noqa: E402
from datetime import time as dtime  # noqa: E402

import httpx  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from fastapi.testclient import TestClient  # noqa: E402

from server.config import Settings  # noqa: E402
from server.services.database import Database  # noqa: E402
from server.services.evaluation import default_ruleset_path, store_ruleset  # noqa: E402
from server.services.observations import MeasureRecord, VintageWriter, define_measures  # noqa: E402
from server.services.regions import RegionRecord, store_regions  # noqa: E402
from server.services.review import publish  # noqa: E402
from server.services.users import add_user  # noqa: E402
from web.app import create_app  # noqa: E402

MEASURES = ("cases", "tests", "positives", "hosp_admissions", "gp_ari")


def build(url: str, n: int, days: int) -> None:
    db = Database.from_settings(Settings(database_url=url, demo_mode=True))
    db.upgrade()
    side = int(np.ceil(np.sqrt(n)))
    rng = np.random.default_rng(5)
    records = [RegionRecord(code="C", name="Bench county", level="county", parent=None,
                            population=n * 50_000)]
    for i in range(n):
        x, y = 10 + (i % side) * 0.05, 50 - (i // side) * 0.04
        ring = [[x, y], [x + 0.05, y], [x + 0.05, y + 0.04], [x, y + 0.04], [x, y]]
        records.append(RegionRecord(
            code=f"B{i:05d}", name=f"Benchdistrict {i:05d}", level="district", parent="C",
            population=int(rng.integers(20_000, 200_000)),
            geometry={"type": "Polygon", "coordinates": [ring]}))
    end = date(2030, 6, 30)
    dates = [end - timedelta(days=k) for k in range(days - 1, -1, -1)]
    with db.transaction() as s:
        define_measures(session=s, measures=[
            MeasureRecord(name=m, unit="count", kind="count", aggregation="sum")
            for m in (*MEASURES, "icu_occupied", "icu_staffed", "ww_concentration", "ww_flow")])
        store_regions(session=s, records=records, actor="bench", source="bench")
        add_user(session=s, name="bench.approver", role="approver", password="bench-pass-1")
    codes = [r.code for r in records[1:]]
    with db.transaction() as s:
        writer = VintageWriter(session=s, feed="bench")
        for j, day in enumerate(dates):
            frames = []
            for m, lam in zip(MEASURES, (40, 800, 60, 3, 50), strict=True):
                frames.append(pd.DataFrame({
                    "region": codes, "measure": m, "ref_date": day.isoformat(),
                    "value": rng.poisson(lam * (1 + j / days), len(codes)).astype(float)}))
            writer.append(pd.concat(frames),
                          received_at=datetime.combine(day + timedelta(days=1), dtime(5), UTC))
    with db.transaction() as s:
        store_ruleset(session=s, path=default_ruleset_path(None), author="bench", activate=True)
    with db.transaction() as s:
        publish(session=s, user="bench.approver")
    db.dispose()


def server_times(client: TestClient, path: str, repeats: int) -> tuple[float, float, float]:
    t0 = time.perf_counter()
    assert client.get(path).status_code == 200
    cold = time.perf_counter() - t0
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        answer = client.get(path)
        times.append(time.perf_counter() - t)
        assert answer.status_code == 200
    times.sort()
    return cold, statistics.median(times), times[int(0.95 * (len(times) - 1))]


async def _hammer(url: str, seconds: float, concurrency: int) -> float:
    done = 0
    stop = time.perf_counter() + seconds

    async def worker(client: httpx.AsyncClient) -> None:
        nonlocal done
        while time.perf_counter() < stop:
            answer = await client.get(url)
            assert answer.status_code == 200
            done += 1

    limits = httpx.Limits(max_connections=concurrency)
    async with httpx.AsyncClient(limits=limits, timeout=120) as client:
        for _ in range(8):  # warm every worker's page cache
            await client.get(url)
        start = time.perf_counter()
        await asyncio.gather(*(worker(client) for _ in range(concurrency)))
        return done / (time.perf_counter() - start)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--regions", type=int, default=3000)
    parser.add_argument("--days", type=int, default=35)
    parser.add_argument("--seconds", type=float, default=5.0)
    parser.add_argument("--repeats", type=int, default=40)
    parser.add_argument("--db", type=Path, default=None,
                        help="SQLite file to build (or reuse when it exists)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        path = args.db or Path(tmp) / "bench.db"
        url = f"sqlite:///{path}"
        if not path.exists():
            t0 = time.perf_counter()
            build(url, args.regions, args.days)
            print(f"built {args.regions} districts x {args.days} days in "  # noqa: T201
                  f"{time.perf_counter() - t0:.1f} s")
        settings = Settings(database_url=url, demo_mode=True)
        with TestClient(create_app(settings)) as client:
            form = client.get("/staff/login").text
            token = form.split('name="login_token" value="')[1].split('"')[0]
            client.post("/staff/login", data={"name": "bench.approver",
                                              "password": "bench-pass-1", "login_token": token})
            for label, path in (("staff overview /staff/", "/staff/"), ("public map /", "/")):
                cold, med, p95 = server_times(client, path, args.repeats)
                print(f"{label:28s} cold {cold * 1000:7.1f} ms  median {med * 1000:6.1f} ms  "  # noqa: T201
                      f"p95 {p95 * 1000:6.1f} ms")
            district = client.get("/district/B00042")
            size = len(district.content)
        static = ROOT / "web" / "static" / f"bench-{os.getpid()}.html"
        static.write_bytes(b"x" * size)
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            port = s.getsockname()[1]
        env = {**os.environ, "TIERWISE_DATABASE_URL": url, "TIERWISE_DEMO_MODE": "true"}
        proc = subprocess.Popen(
            [sys.executable, "-m", "uvicorn", "web.app:app_from_environment", "--factory",
             "--workers", "2", "--port", str(port), "--log-level", "warning", "--no-access-log"],
            cwd=ROOT, env=env)
        base = f"http://127.0.0.1:{port}"
        try:
            for _ in range(300):
                try:
                    if httpx.get(base + "/healthz").status_code == 200:
                        break
                except httpx.HTTPError:
                    time.sleep(0.1)
            page = asyncio.run(_hammer(base + "/district/B00042", args.seconds, 32))
            flat = asyncio.run(_hammer(base + f"/static/{static.name}", args.seconds, 32))
        finally:
            proc.terminate()
            proc.wait(timeout=10)
            static.unlink(missing_ok=True)
        print(f"public district page ({size} bytes): {page:7.0f} req/s with 2 workers")  # noqa: T201
        print(f"static file of the same size:      {flat:7.0f} req/s")  # noqa: T201
        print(f"ratio page / static:               {page / flat:7.2f}")  # noqa: T201


if __name__ == "__main__":
    main()
