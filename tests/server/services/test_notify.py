"""Notifications against local servers on 127.0.0.1: a webhook (http.server) and an SMTP sink."""

from __future__ import annotations

import hashlib
import hmac
import json
import socket
import socketserver
import threading
from collections.abc import Iterator
from datetime import UTC, date, datetime, timedelta
from http.server import BaseHTTPRequestHandler, HTTPServer
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import IndicatorSeries, evaluate, parse_ruleset
from server.services.errors import InputFileError
from server.services.evaluation import evaluate_districts
from server.services.notify import (
    SIGNATURE_HEADER,
    NotifyConfig,
    Recipient,
    SmtpServer,
    deliver,
    events_on_day,
    load_notify_config,
    notify_config_from,
    sign,
)
from server.services.review import (
    current_run,
    decide,
    official_tiers,
    pending_changes,
    publish,
)
from server.services.rulesets import active_ruleset
from server.store.models import Assessment, AuditEntry
from server.store.vintages import append_vintage
from tests.server.conftest import seen

RULES = """\
name: notify
version: "1"
tiers:
  - {name: T0, staff: s, public: p}
  - {name: T1, staff: s, public: p}
indicators:
  x: {label: x}
  ww: {label: wastewater}
criteria:
  - {id: x, indicator: x, enter: [10]}
prepare:
  - {id: ww-rise, indicator: ww, above: 5, for: 1, message: Wastewater is rising.}
"""


def _events():  # type: ignore[no-untyped-def]
    ev = evaluate(
        parse_ruleset(RULES),
        {"x": IndicatorSeries(estimate=np.array([[1.0, 20.0], [1.0, 1.0]])),
         "ww": IndicatorSeries(estimate=np.array([[0.0, 0.0], [0.0, 9.0]]))},
        regions=["A", "B"], dates=np.arange(2) + np.datetime64("2031-04-01"),
    )
    return events_on_day(ev)


class _Hook(BaseHTTPRequestHandler):
    received: list[tuple[dict[str, str], bytes]] = []
    fail_first = 0

    def do_POST(self) -> None:  # noqa: N802 (http.server's name)
        body = self.rfile.read(int(self.headers["Content-Length"]))
        type(self).received.append((dict(self.headers), body))
        code = 500 if type(self).fail_first > 0 else 200
        type(self).fail_first -= 1
        self.send_response(code)
        self.end_headers()

    def log_message(self, *args: object) -> None:
        return None


@pytest.fixture
def hook() -> Iterator[tuple[str, type[_Hook]]]:
    handler = type("Hook", (_Hook,), {"received": [], "fail_first": 0})
    server = HTTPServer(("127.0.0.1", 0), handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield f"http://127.0.0.1:{server.server_address[1]}/hook", handler
    server.shutdown()
    server.server_close()


class _Smtp(socketserver.StreamRequestHandler):
    """A minimal SMTP sink (RFC 5321 commands HELO/EHLO, MAIL, RCPT, DATA, QUIT)."""

    messages: list[bytes] = []

    def handle(self) -> None:
        self.wfile.write(b"220 sink\r\n")
        while line := self.rfile.readline():
            verb = line[:4].upper()
            if verb == b"DATA":
                self.wfile.write(b"354 go\r\n")
                data = b""
                while (part := self.rfile.readline()) not in (b".\r\n", b""):
                    data += part
                type(self).messages.append(data)
                self.wfile.write(b"250 stored\r\n")
            elif verb == b"QUIT":
                self.wfile.write(b"221 bye\r\n")
                return
            else:
                self.wfile.write(b"250 ok\r\n")


@pytest.fixture
def smtp() -> Iterator[tuple[int, type[_Smtp]]]:
    handler = type("Smtp", (_Smtp,), {"messages": []})
    server = socketserver.ThreadingTCPServer(("127.0.0.1", 0), handler)
    server.daemon_threads = True
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield server.server_address[1], handler
    server.shutdown()
    server.server_close()


def test_sign_matches_rfc4231_test_case_2() -> None:
    # RFC 4231 (2005), test case 2: key "Jefe", data "what do ya want for nothing?" [memory]
    expected = "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
    assert sign("Jefe", b"what do ya want for nothing?") == f"sha256={expected}"


def test_events_on_day_finds_the_change_and_the_signal() -> None:
    kinds = sorted((e.kind, e.region) for e in _events())
    assert kinds == [("prepare", "B"), ("tier_change", "A")]


def test_webhook_posts_signed_json(hook: tuple[str, type[_Hook]]) -> None:
    url, handler = hook
    config = NotifyConfig(recipients=(Recipient(id="desk", webhook=url, secret="s3cret"),))
    (delivery,) = deliver(_events(), config)
    headers, body = handler.received[0]
    # reference: the standard library's HMAC over the bytes received
    assert headers[SIGNATURE_HEADER] == "sha256=" + hmac.new(
        b"s3cret", body, hashlib.sha256).hexdigest()
    assert delivery.ok and len(json.loads(body)["events"]) == 2


def test_webhook_retries_server_errors(hook: tuple[str, type[_Hook]]) -> None:
    url, handler = hook
    handler.fail_first = 2
    config = NotifyConfig(recipients=(Recipient(id="desk", webhook=url, secret="k"),),
                          attempts=4, backoff_seconds=0.01)
    (delivery,) = deliver(_events(), config)
    assert (delivery.ok, delivery.attempts, len(handler.received)) == (True, 3, 3)


def test_webhook_gives_up_after_the_last_attempt(hook: tuple[str, type[_Hook]]) -> None:
    url, handler = hook
    handler.fail_first = 10
    config = NotifyConfig(recipients=(Recipient(id="desk", webhook=url, secret="k"),),
                          attempts=2, backoff_seconds=0.01)
    (delivery,) = deliver(_events(), config)
    assert (delivery.ok, delivery.attempts, delivery.error) == (False, 2, "HTTP 500")


def test_email_goes_through_smtp(smtp: tuple[int, type[_Smtp]]) -> None:
    port, handler = smtp
    config = NotifyConfig(
        recipients=(Recipient(id="officer", email="officer@office.invalid",
                              events=("tier_change",)),),
        smtp=SmtpServer(host="127.0.0.1", port=port, sender="tierwise@office.invalid"),
    )
    (delivery,) = deliver(_events(), config)
    text = handler.messages[0].decode()
    assert delivery.ok and "To: officer@office.invalid" in text and "2031-04-02 A: " in text


def test_recipient_filters_regions(hook: tuple[str, type[_Hook]]) -> None:
    url, handler = hook
    config = NotifyConfig(recipients=(Recipient(id="b", webhook=url, secret="k", regions=("B",)),))
    deliver(_events(), config)
    (event,) = json.loads(handler.received[0][1])["events"]
    assert event["region"] == "B"


def test_load_config_names_the_unknown_key(tmp_path: Path) -> None:
    path = tmp_path / "notify.yaml"
    path.write_text("recipients:\n  - {id: a, email: a@office.invalid, colour: red}\n")
    with pytest.raises(InputFileError, match=r"notify.yaml: recipients\[0\].colour: unknown key"):
        load_notify_config(path)


def test_load_config_requires_a_webhook_secret(tmp_path: Path) -> None:
    path = tmp_path / "notify.yaml"
    path.write_text("recipients:\n  - {id: a, webhook: 'http://127.0.0.1:9/x'}\n")
    with pytest.raises(InputFileError, match=r"recipients\[0\].secret: a webhook needs a secret"):
        load_notify_config(path)


def test_notify_config_from_none_is_none() -> None:
    assert notify_config_from(None) is None


def test_deliver_goes_on_after_a_malformed_webhook(hook: tuple[str, type[_Hook]]) -> None:
    url, handler = hook
    config = NotifyConfig(recipients=(
        Recipient(id="broken", webhook="http://[not a host/x", secret="k"),
        Recipient(id="desk", webhook=url, secret="k"),
    ), attempts=1)
    broken, desk = deliver(_events(), config)
    assert (broken.ok, desk.ok, len(handler.received)) == (False, True, 1)


# --- wiring into the evaluation and publication services (a seeded 150-day demo database) ---

APPROVER = "otto.approver"  # invented demo account (demo_seed.seed)
# Mornings of the seeded demo (tests/server/conftest.py: default seed, end 30 Nov 2026) whose
# newest day has events, found by evaluating every morning of its last 100 days as known then:
# the long-csv file of 28 Nov (received 29 Nov 05:30) moves Seldrin (D05) down a tier, the last
# step down of the storyline's west (demo_seed.storyline.SCRIPT); the morning of 19 Sep, after
# every feed has landed, starts D03's Rt signal. No morning of those 100 days has both.
CUTOFF = datetime(2026, 11, 29, 5, 30, tzinfo=UTC)
PREPARE_CUTOFF = datetime(2026, 9, 19, 7, 0, tzinfo=UTC)


def _closed_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def _to(url: str) -> NotifyConfig:
    return NotifyConfig(recipients=(Recipient(id="desk", webhook=url, secret="k"),),
                        attempts=1, backoff_seconds=0.01)


def _newest_assessment(session: Session, region: str) -> int:
    """Id of the assessment a decision on ``region`` answers (its newest one)."""
    latest = current_run(session=session)
    assert latest is not None
    return next(i.assessment.id for i in latest.items if i.code == region)


def _audit(session: Session, action: str) -> list[AuditEntry]:
    return list(session.scalars(select(AuditEntry).where(AuditEntry.action == action)))


@pytest.mark.slow
def test_evaluation_posts_the_newest_days_events(
    demo_session: Session, hook: tuple[str, type[_Hook]]
) -> None:
    url, handler = hook
    row = active_ruleset(session=demo_session)
    assert row is not None
    for cutoff, kind in ((CUTOFF, "tier_change"), (PREPARE_CUTOFF, "prepare")):
        run = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=cutoff,
                                 notify=_to(url))
        assert run is not None and run.evaluation is not None
        expected = events_on_day(run.evaluation)
        newest = (cutoff - timedelta(days=1)).date().isoformat()
        assert {e.kind for e in expected} == {kind}
        body = json.loads(handler.received[-1][1])
        posted = sorted((e["kind"], e["region"], e["date"]) for e in body["events"])
        assert posted == sorted((e.kind, e.region, newest) for e in expected)
    assert len(handler.received) == 2
    assert [a.subject for a in _audit(demo_session, "notify.sent")] == ["desk", "desk"]


@pytest.mark.slow
def test_evaluation_reusing_stored_rows_sends_nothing(
    demo_session: Session, hook: tuple[str, type[_Hook]]
) -> None:
    url, handler = hook
    row = active_ruleset(session=demo_session)
    assert row is not None
    evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF)
    again = evaluate_districts(
        session=demo_session, ruleset_row=row, cutoff=CUTOFF, notify=_to(url)
    )
    assert again is not None and again.reused and handler.received == []


@pytest.mark.slow
def test_failed_delivery_is_audited_and_keeps_the_assessments(demo_session: Session) -> None:
    row = active_ruleset(session=demo_session)
    assert row is not None
    dead = _to(f"http://127.0.0.1:{_closed_port()}/hook")
    run = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF, notify=dead)
    assert run is not None and run.written > 0 and not run.notified[0].ok
    stored = demo_session.scalar(
        select(Assessment.id).where(Assessment.data_cutoff == CUTOFF).limit(1)
    )
    (entry,) = _audit(demo_session, "notify.failed")
    assert stored is not None and entry.details["context"] == "evaluation"
    assert entry.details["error"].startswith("ConnectError")


@pytest.mark.slow
def test_publication_posts_each_changed_public_tier(
    demo_session: Session, hook: tuple[str, type[_Hook]]
) -> None:
    url, handler = hook
    publish(session=demo_session, user=APPROVER, notify=_to(url))
    first = json.loads(handler.received[0][1])["events"]
    public = official_tiers(session=demo_session)
    assert sorted((e["region"], e["tier"], e["previous"]) for e in first) == sorted(
        (code, t.tier, None) for code, t in public.items()
    )
    # an override that changes one district's tier: the next publication sends only that one
    target = next(iter(public.values()))
    decide(session=demo_session, assessment_id=_newest_assessment(demo_session, target.region),
           user=APPROVER, accept=False, tier=(target.tier + 1) % 4, reason="invented test reason",
           **seen(demo_session, _newest_assessment(demo_session, target.region)))
    publish(session=demo_session, user=APPROVER, notify=_to(url))
    (second,) = json.loads(handler.received[1][1])["events"]
    assert (second["kind"], second["region"], second["tier"], second["previous"]) == (
        "published", target.region, (target.tier + 1) % 4, target.tier
    )


@pytest.mark.slow
def test_failed_publication_notice_never_undoes_the_publication(demo_session: Session) -> None:
    pending = {p.region for p in pending_changes(session=demo_session)}
    dead = _to(f"http://127.0.0.1:{_closed_port()}/hook")
    result = publish(session=demo_session, user=APPROVER, notify=dead)
    assert set(official_tiers(session=demo_session)) == pending == set(result.regions)
    (entry,) = _audit(demo_session, "notify.failed")
    assert (entry.actor, entry.details["context"]) == (APPROVER, "publication")


def _posted_key(event: dict[str, object]) -> str:
    """:attr:`Event.key` of a posted event, rebuilt from its JSON."""
    what = event["signal"] if event["kind"] == "prepare" else event["tier"]
    key = f"{event['kind']}|{event['region']}|{event['date']}|{what}"
    return f"{key}|{event['policy']}" if event.get("policy") else key


def _second_ingestion(session: Session, minutes: int) -> datetime:
    """A late file the same morning re-sending one known value; returns its arrival time."""
    later = CUTOFF + timedelta(minutes=minutes)
    append_vintage(
        session=session, feed="late-file", received_at=later, checksum=f"late-{minutes}",
        rows=pd.DataFrame({"region": ["D01"], "measure": ["cases"],
                           "ref_date": [date(2026, 10, 1)], "value": [3.0]}),
    )
    return later


@pytest.mark.slow
def test_second_ingestion_the_same_morning_sends_nothing_again(
    demo_session: Session, hook: tuple[str, type[_Hook]]
) -> None:
    url, handler = hook
    row = active_ruleset(session=demo_session)
    assert row is not None
    evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF, notify=_to(url))
    later = _second_ingestion(demo_session, 20)
    again = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=later, notify=_to(url))
    # the same newest day evaluated again: new assessments, the same events
    assert again is not None and again.written > 0 and again.evaluation is not None
    first = json.loads(handler.received[0][1])["events"]
    assert first and sorted(e.key for e in events_on_day(again.evaluation)) == sorted(
        _posted_key(e) for e in first)
    assert len(handler.received) == 1 and again.notified == ()
    assert len(_audit(demo_session, "notify.sent")) == 1


@pytest.mark.slow
def test_an_event_already_sent_to_one_recipient_still_goes_to_another(
    demo_session: Session, hook: tuple[str, type[_Hook]]
) -> None:
    url, handler = hook
    row = active_ruleset(session=demo_session)
    assert row is not None
    evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF, notify=_to(url))
    both = NotifyConfig(recipients=(Recipient(id="desk", webhook=url, secret="k"),
                                    Recipient(id="night", webhook=url, secret="k")), attempts=1)
    later = _second_ingestion(demo_session, 25)
    again = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=later, notify=both)
    assert again is not None
    sent = len(json.loads(handler.received[0][1])["events"])
    assert sent > 0 and [(d.recipient, d.events) for d in again.notified] == [("night", sent)]
    assert len(handler.received) == 2


@pytest.mark.slow
def test_a_failed_notice_is_sent_at_the_next_evaluation(
    demo_session: Session, hook: tuple[str, type[_Hook]]
) -> None:
    url, handler = hook
    row = active_ruleset(session=demo_session)
    assert row is not None
    dead = _to(f"http://127.0.0.1:{_closed_port()}/hook")
    evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF, notify=dead)
    later = _second_ingestion(demo_session, 30)
    again = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=later, notify=_to(url))
    assert again is not None and again.evaluation is not None
    assert [d.ok for d in again.notified] == [True]
    events = json.loads(handler.received[0][1])["events"]
    assert events and sorted(_posted_key(e) for e in events) == sorted(
        e.key for e in events_on_day(again.evaluation))
