"""A real HTTP server on 127.0.0.1 (ephemeral port) for the pull tests."""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import pytest

BODY = b"region,date,measure,value\nQA,2026-03-01,cases,4\n"


@dataclass
class Behaviour:
    """What the server answers; tests change it between requests."""

    status: int = 200
    body: bytes = BODY
    etag: str | None = '"v1"'
    delay: float = 0.0
    huge: int = 0
    requests: list[dict[str, str]] = field(default_factory=list)


class Server:
    def __init__(self) -> None:
        self.behaviour = Behaviour()
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def log_message(self, *_args: object) -> None:
                return

            def do_GET(self) -> None:  # noqa: N802 - http.server's naming
                b = outer.behaviour
                b.requests.append(dict(self.headers))
                if b.delay:
                    time.sleep(b.delay)
                if b.etag and self.headers.get("If-None-Match") == b.etag:
                    self.send_response(304)
                    self.end_headers()
                    return
                self.send_response(b.status)
                if b.etag:
                    self.send_header("ETag", b.etag)
                if b.huge:
                    self.send_header("Content-Type", "text/csv")
                    self.end_headers()
                    try:
                        for _ in range(b.huge):
                            self.wfile.write(b"x" * 65536)
                    except (BrokenPipeError, ConnectionResetError):
                        pass
                    return
                self.send_header("Content-Length", str(len(b.body)))
                self.end_headers()
                self.wfile.write(b.body)

        self.httpd = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.httpd.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.httpd.server_address[1]}/feed.csv"
        self.thread = threading.Thread(target=self.httpd.serve_forever, daemon=True)
        self.thread.start()

    def close(self) -> None:
        self.httpd.shutdown()
        self.httpd.server_close()


@pytest.fixture
def http_server() -> Iterator[Server]:
    server = Server()
    try:
        yield server
    finally:
        server.close()
