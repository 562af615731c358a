"""HTTP pulls against a real local server: 200 with ETag, 304, 500, slow, huge; file drops."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

import pytest

from server.feeds.definition import FileSource, HttpSource
from server.feeds.errors import PermanentFetchError, TransientFetchError
from server.feeds.sources import Payload, RetryPolicy, fetch, move_aside, pending_files

FAST = RetryPolicy(attempts=3, first_wait=0.0, max_wait=0.0)


def source(url: str, **kw: object) -> HttpSource:
    return HttpSource(url=url, **kw)  # type: ignore[arg-type]


def test_fetch_200_returns_body_and_etag(http_server) -> None:  # type: ignore[no-untyped-def]
    got = fetch(source(http_server.url), policy=FAST)
    assert (got.status, got.content, got.etag) == (200, http_server.behaviour.body, '"v1"')


def test_fetch_sends_if_none_match_and_gets_304(http_server) -> None:  # type: ignore[no-untyped-def]
    got = fetch(source(http_server.url), etag='"v1"', policy=FAST)
    assert (got.status, got.content) == (304, None)
    assert http_server.behaviour.requests[-1]["If-None-Match"] == '"v1"'


def test_fetch_500_is_retried_then_raised(http_server) -> None:  # type: ignore[no-untyped-def]
    http_server.behaviour.status = 500
    with pytest.raises(TransientFetchError, match="HTTP 500"):
        fetch(source(http_server.url), policy=FAST)
    assert len(http_server.behaviour.requests) == 3


def test_fetch_404_is_not_retried(http_server) -> None:  # type: ignore[no-untyped-def]
    http_server.behaviour.status = 404
    with pytest.raises(PermanentFetchError, match="HTTP 404"):
        fetch(source(http_server.url), policy=FAST)
    assert len(http_server.behaviour.requests) == 1


def test_fetch_slow_response_times_out_as_transient(http_server) -> None:  # type: ignore[no-untyped-def]
    http_server.behaviour.delay = 1.0
    with pytest.raises(TransientFetchError, match="timed out"):
        fetch(source(http_server.url, timeout_s=0.2), policy=RetryPolicy(attempts=2,
                                                                          first_wait=0.0))


def test_fetch_huge_body_stops_at_size_limit(http_server) -> None:  # type: ignore[no-untyped-def]
    http_server.behaviour.huge = 200  # 12.5 MiB, streamed without Content-Length
    with pytest.raises(PermanentFetchError, match="exceeds max_bytes 1000000"):
        fetch(source(http_server.url, max_bytes=1_000_000), policy=FAST)


def test_fetch_token_from_environment_is_sent(http_server) -> None:  # type: ignore[no-untyped-def]
    fetch(source(http_server.url, token_env="FEED_TOKEN"), environ={"FEED_TOKEN": "s3cret"},
          policy=FAST)
    assert http_server.behaviour.requests[-1]["Authorization"] == "Bearer s3cret"


def test_fetch_missing_token_variable_is_permanent(http_server) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(PermanentFetchError, match="FEED_TOKEN"):
        fetch(source(http_server.url, token_env="FEED_TOKEN"), environ={}, policy=FAST)
    assert http_server.behaviour.requests == []


def test_fetch_refused_connection_is_transient() -> None:
    with pytest.raises(TransientFetchError, match="connection failed"):
        fetch(source("http://127.0.0.1:9/nothing"), policy=FAST)


def test_move_aside_never_overwrites(tmp_path: Path) -> None:
    drop = FileSource(folder=tmp_path / "in", glob="*.csv")
    drop.folder.mkdir()
    now = datetime(2026, 3, 1, tzinfo=UTC)
    for _ in range(2):
        (drop.folder / "a.csv").write_text("x")
        move_aside(drop.folder / "a.csv", drop, outcome="processed", now=now)
    assert len(list(drop.done_folder.iterdir())) == 2
    assert pending_files(drop) == []


def test_payload_from_path_checksum_matches_bytes(tmp_path: Path) -> None:
    path = tmp_path / "f.csv"
    path.write_bytes(b"abc")
    # SHA-256("abc") from FIPS 180-2, Appendix B.1.
    expected = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert Payload.from_path(path).checksum == Payload.from_bytes("x", b"abc").checksum == expected
