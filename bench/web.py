"""Web benchmark: overview and public map at 3 000 regions; public district page requests/s.

Builds a scratch SQLite database of invented square districts with a few weeks of daily counts,
evaluates the shipped county policy, publishes every district, then measures

* the staff overview (first page, 100 rows) and the public map (all shapes): median and 95th
  percentile of the server time (in process, warm cache; the first, cold request is shown apart);
* requests per second of one public district page served by ``uvicorn --workers 2`` on loopback,
  and of a static file of the same size from the same server in the same run (ratio printed).

The load generator is a raw asyncio HTTP/1.1 client (uvloop when installed) holding many
keep-alive connections, in one or more processes: a client library on the same cores would cap
both rates well below what the server does (the static file then measured ~200 req/s instead of
~1 800). When the static rate no longer rises with ``--clients 2``, the server is the limit.

    python bench/web.py [--regions 3000] [--days 35] [--seconds 5] [--db FILE.db]
                        [--connections 64] [--clients 1]

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
import multiprocessing  # noqa: E402
import os  # noqa: E402
import re  # noqa: E402
import socket  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from datetime import UTC, date, datetime, timedelta  # noqa: E402
from datetime import time as dtime  # noqa: E402
from functools import partial  # noqa: E402

import httpx  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from fastapi.testclient import TestClient  # noqa: E402

from server.config import Settings  # noqa: E402
from server.services.database import Database  # noqa: E402
from server.services.observations import MeasureRecord, VintageWriter, define_measures  # noqa: E402
from server.services.regions import RegionRecord, store_regions  # noqa: E402
from server.services.review_publication import publish  # noqa: E402
from server.services.ruleset_activation import store_ruleset  # noqa: E402
from server.services.rulesets import default_ruleset_path  # noqa: E402
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


_LENGTH = re.compile(rb"\r\ncontent-length:\s*(\d+)")


class _KeepAlive(asyncio.Protocol):
    """One keep-alive HTTP/1.1 connection that sends ``request`` again after each full answer.

    Parses only the status line and ``Content-Length`` (the server sends no chunked bodies for
    these two routes); any status but 200 is counted as an error.
    """

    def __init__(self, request: bytes, stop: float, tally: list[int],
                 closed: asyncio.Future[None]) -> None:
        self.request, self.stop, self.tally, self.closed = request, stop, tally, closed
        self.buffer = bytearray()
        self.need = -1  # bytes of the current answer (head + body) once its head is complete
        self.transport: asyncio.WriteTransport | None = None

    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        self.transport = transport  # type: ignore[assignment]
        self.transport.write(self.request)  # type: ignore[union-attr]

    def data_received(self, data: bytes) -> None:
        self.buffer += data
        while True:
            if self.need < 0:
                end = self.buffer.find(b"\r\n\r\n")
                if end < 0:
                    return
                head = bytes(self.buffer[:end]).lower()
                if not head.startswith(b"http/1.1 200"):
                    self.tally[1] += 1
                length = _LENGTH.search(head)
                self.need = end + 4 + (int(length.group(1)) if length else 0)
            if len(self.buffer) < self.need:
                return
            del self.buffer[:self.need]
            self.need = -1
            self.tally[0] += 1
            assert self.transport is not None
            if time.perf_counter() >= self.stop:
                self.transport.close()
                return
            self.transport.write(self.request)

    def connection_lost(self, exc: Exception | None) -> None:
        if not self.closed.done():
            self.closed.set_result(None)


async def _hammer_async(host: str, port: int, path: str, seconds: float,
                        connections: int) -> tuple[int, int, float]:
    loop = asyncio.get_running_loop()
    request = (f"GET {path} HTTP/1.1\r\nHost: {host}:{port}\r\n"
               "Accept-Language: en\r\n\r\n").encode()
    tally = [0, 0]  # answers, answers that were not 200
    start = time.perf_counter()
    stop = start + seconds
    waits: list[asyncio.Future[None]] = []
    for _ in range(connections):
        closed: asyncio.Future[None] = loop.create_future()
        await loop.create_connection(partial(_KeepAlive, request, stop, tally, closed),
                                     host, port)
        waits.append(closed)
    await asyncio.wait_for(asyncio.gather(*waits), timeout=seconds + 60)
    return tally[0], tally[1], time.perf_counter() - start


def _hammer_process(args: tuple[str, int, str, float, int]) -> tuple[int, int, float]:
    try:
        import uvloop  # the bench only: a faster event loop, when installed
    except ImportError:
        return asyncio.run(_hammer_async(*args))
    return uvloop.run(_hammer_async(*args))


def hammer(host: str, port: int, path: str, *, seconds: float, connections: int,
           clients: int) -> float:
    """Requests/s of ``path`` from ``clients`` processes with ``connections`` keep-alive
    connections in all (raw HTTP/1.1, no client library in the way); 200 answers only."""
    for _ in range(8):  # warm every worker's page cache
        assert httpx.get(f"http://{host}:{port}{path}").status_code == 200
    per = max(1, connections // clients)
    with multiprocessing.get_context("spawn").Pool(clients) as pool:
        results = pool.map(_hammer_process, [(host, port, path, seconds, per)] * clients)
    bad = sum(r[1] for r in results)
    if bad:
        raise RuntimeError(f"{path}: {bad} answers were not 200 OK")
    return sum(r[0] for r in results) / max(r[2] for r in results)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--regions", type=int, default=3000)
    parser.add_argument("--days", type=int, default=35)
    parser.add_argument("--seconds", type=float, default=5.0)
    parser.add_argument("--repeats", type=int, default=40)
    parser.add_argument("--connections", type=int, default=64,
                        help="keep-alive connections of the load generator (in all)")
    parser.add_argument("--clients", type=int, default=1,
                        help="load-generator processes sharing the connections")
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
        else:  # a database built by an older checkout: bring its schema up to date
            db = Database.from_settings(Settings(database_url=url, demo_mode=True))
            db.upgrade()
            db.dispose()
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
            load = {"seconds": args.seconds, "connections": args.connections,
                    "clients": args.clients}
            page = hammer("127.0.0.1", port, "/district/B00042", **load)
            flat = hammer("127.0.0.1", port, f"/static/{static.name}", **load)
        finally:
            proc.terminate()
            proc.wait(timeout=10)
            static.unlink(missing_ok=True)
        print(f"public district page ({size} bytes): {page:7.0f} req/s with 2 workers")  # noqa: T201
        print(f"static file of the same size:      {flat:7.0f} req/s")  # noqa: T201
        print(f"ratio page / static:               {page / flat:7.2f}")  # noqa: T201


if __name__ == "__main__":
    main()
