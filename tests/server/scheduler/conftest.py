"""A feed server for the scheduler tests (``committed_db`` is in ``tests/conftest.py``)."""

from __future__ import annotations

import threading
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import pytest


class FeedServer:
    """Serves ``self.body`` with an ETag derived from ``self.version``; counts requests."""

    def __init__(self) -> None:
        self.body = b"region,date,measure,value\nSA,2026-03-01,cases,1\n"
        self.version = 1
        self.requests = 0
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def log_message(self, *_args: object) -> None:
                return

            def do_GET(self) -> None:  # noqa: N802
                outer.requests += 1
                etag = f'"v{outer.version}"'
                if self.headers.get("If-None-Match") == etag:
                    self.send_response(304)
                    self.end_headers()
                    return
                self.send_response(200)
                self.send_header("ETag", etag)
                self.send_header("Content-Length", str(len(outer.body)))
                self.end_headers()
                self.wfile.write(outer.body)

        self.httpd = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.httpd.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.httpd.server_address[1]}/cases.csv"
        threading.Thread(target=self.httpd.serve_forever, daemon=True).start()

    def publish(self, body: bytes) -> None:
        self.body = body
        self.version += 1


@pytest.fixture
def feed_server() -> Iterator[FeedServer]:
    server = FeedServer()
    try:
        yield server
    finally:
        server.httpd.shutdown()
        server.httpd.server_close()
