"""Use case: tell people about tier changes and prepare signals (webhooks and e-mail).

Recipients are configured in a YAML file (setting ``TIERWISE_NOTIFY_FILE``)::

    smtp: {host: 127.0.0.1, port: 25, sender: tierwise@office.invalid}
    recipients:
      - id: duty-desk
        webhook: https://hooks.office.invalid/tierwise
        secret: a-long-shared-secret        # signs the body (HMAC-SHA256)
        events: [tier_change, prepare]      # default: all three kinds
        regions: [D01, D02]                 # default: every district
      - id: officer
        email: officer@office.invalid
        events: [tier_change]

Event kinds: ``tier_change`` (a recommended tier in force changed on the newest day of an
evaluation), ``prepare`` (a prepare signal started showing that day) and ``published`` (a
publication changed a district's official, public tier). Services deliver only when the caller
passes a loaded :class:`NotifyConfig` (see :func:`notify_config_from`); a delivery failure is
logged and written to the audit log (``notify.failed``), and never breaks the evaluation or the
publication that caused it (:func:`deliver_and_record`).

A notice is sent once: every ``notify.sent`` audit entry lists the keys of the events it carried
(:attr:`Event.key`: kind, region, date and tier or signal), and :func:`deliver_and_record` skips,
per recipient, a ``tier_change`` or ``prepare`` event already sent to it (a second ingestion on the
same morning re-evaluates the same newest day and finds the same events). ``published`` events
are never skipped: each comes from a publication that changed a public tier.

A webhook receives ``POST`` of a JSON body ``{"events": [...]}`` with the header
``X-Tierwise-Signature: sha256=<hex HMAC-SHA256 of the body with the recipient's secret>``; a
failed POST (connection error or a 5xx answer) is retried with exponential backoff
(tenacity). E-mail is one plain-text message per recipient through the SMTP server.

References
----------
Krawczyk H, Bellare M, Canetti R (1997). HMAC: keyed-hashing for message authentication.
RFC 2104.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import logging
import smtplib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import date
from email.message import EmailMessage
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import yaml
from sqlalchemy import select
from sqlalchemy.orm import Session
from tenacity import Retrying, retry_if_exception_type, stop_after_attempt, wait_exponential

from rules import Evaluation
from rules.explanation import signal_message
from server.services.audit import record
from server.services.errors import InputFileError
from server.store.models import AuditEntry

__all__ = [
    "EVENT_KINDS",
    "ONCE_KINDS",
    "SIGNATURE_HEADER",
    "Delivery",
    "Event",
    "NotifyConfig",
    "Recipient",
    "SmtpServer",
    "deliver",
    "deliver_and_record",
    "events_on_day",
    "sent_keys",
    "load_notify_config",
    "notify_config_from",
    "sign",
]

log = logging.getLogger(__name__)

EVENT_KINDS = ("tier_change", "prepare", "published")
#: Kinds sent at most once per recipient and key (see :attr:`Event.key`).
ONCE_KINDS = ("tier_change", "prepare")
SIGNATURE_HEADER = "X-Tierwise-Signature"


@dataclass(frozen=True, kw_only=True)
class Recipient:
    """One webhook or e-mail address, with the events and regions it wants."""

    id: str
    webhook: str | None = None
    secret: str = ""
    email: str | None = None
    events: tuple[str, ...] = EVENT_KINDS
    regions: tuple[str, ...] = ()

    def wants(self, event: Event) -> bool:
        return event.kind in self.events and (not self.regions or event.region in self.regions)


@dataclass(frozen=True, kw_only=True)
class SmtpServer:
    host: str = "127.0.0.1"
    port: int = 25
    sender: str = "tierwise@localhost"
    timeout: float = 10.0


@dataclass(frozen=True, kw_only=True)
class NotifyConfig:
    recipients: tuple[Recipient, ...]
    smtp: SmtpServer = field(default_factory=SmtpServer)
    attempts: int = 4
    backoff_seconds: float = 1.0


@dataclass(frozen=True, kw_only=True)
class Event:
    """A tier change in force on ``date``, a prepare signal that started showing on it, or a
    published official tier in force from ``date``."""

    kind: str
    region: str
    date: date
    tier: int
    previous: int | None
    signal: str | None
    sentence: str
    #: The policy (ruleset name) the event belongs to ("" when not known).
    policy: str = ""

    @property
    def key(self) -> str:
        """``kind|region|date|tier`` (the signal for a prepare signal), then ``|policy`` when
        known: what makes it the same notice (two policies' changes are two notices)."""
        what = self.signal if self.kind == "prepare" else str(self.tier)
        key = f"{self.kind}|{self.region}|{self.date.isoformat()}|{what}"
        return f"{key}|{self.policy}" if self.policy else key

    def as_json(self) -> dict[str, Any]:
        return {
            "kind": self.kind, "region": self.region, "date": self.date.isoformat(),
            "tier": self.tier, "previous": self.previous, "signal": self.signal,
            "sentence": self.sentence, "policy": self.policy,
        }


@dataclass(frozen=True, kw_only=True)
class Delivery:
    """What happened for one recipient (``keys``: :attr:`Event.key` of the events it got)."""

    recipient: str
    events: int
    ok: bool
    attempts: int
    error: str = ""
    keys: tuple[str, ...] = ()


def _problem(path: Path, where: str, problem: str) -> InputFileError:
    return InputFileError(str(path), where, problem)


def load_notify_config(path: Path) -> NotifyConfig:
    """Read and check the recipients file; every problem names the file and the key."""
    try:
        doc = yaml.safe_load(path.read_text(encoding="utf-8")) or {}
    except (OSError, yaml.YAMLError) as exc:
        raise _problem(path, "", f"cannot read: {exc}") from None
    if not isinstance(doc, dict):
        raise _problem(path, "", "expected a mapping with 'recipients'")
    unknown = set(doc) - {"recipients", "smtp", "attempts", "backoff_seconds"}
    if unknown:
        raise _problem(path, sorted(unknown)[0], "unknown key")
    smtp_doc = doc.get("smtp") or {}
    if not isinstance(smtp_doc, dict) or set(smtp_doc) - {"host", "port", "sender", "timeout"}:
        raise _problem(path, "smtp", "expected {host, port, sender, timeout}")
    recipients = []
    for i, item in enumerate(doc.get("recipients") or []):
        where = f"recipients[{i}]"
        if not isinstance(item, dict) or "id" not in item:
            raise _problem(path, where, "each recipient needs an id")
        extra = set(item) - {"id", "webhook", "secret", "email", "events", "regions"}
        if extra:
            raise _problem(path, f"{where}.{sorted(extra)[0]}", "unknown key")
        if ("webhook" in item) == ("email" in item):
            raise _problem(path, where, "give exactly one of webhook or email")
        if "webhook" in item and not str(item.get("secret", "")):
            raise _problem(path, f"{where}.secret", "a webhook needs a secret to sign with")
        events = tuple(item.get("events") or EVENT_KINDS)
        bad = [e for e in events if e not in EVENT_KINDS]
        if bad:
            raise _problem(path, f"{where}.events", f"unknown event {bad[0]!r}")
        recipients.append(
            Recipient(
                id=str(item["id"]), webhook=item.get("webhook"), secret=str(item.get("secret", "")),
                email=item.get("email"), events=events,
                regions=tuple(str(r) for r in item.get("regions") or ()),
            )
        )
    return NotifyConfig(
        recipients=tuple(recipients), smtp=SmtpServer(**smtp_doc),
        attempts=int(doc.get("attempts", 4)), backoff_seconds=float(doc.get("backoff_seconds", 1)),
    )


def notify_config_from(path: Path | None) -> NotifyConfig | None:
    """The recipients file at ``path`` (``settings.notify_file``) loaded, or None when unset."""
    return None if path is None else load_notify_config(path)


def events_on_day(ev: Evaluation, day_index: int = -1) -> list[Event]:
    """Tier changes in force and prepare signals starting on one day (default: the last), each
    naming the evaluated policy."""
    d = day_index % ev.dates.size
    tier = ev.tier[:, d]
    before = ev.tier[:, d - 1] if d else ev.start_in_force
    day = ev.dates[d].astype(date)
    out = []
    moved = np.flatnonzero((tier != before) & (tier >= 0) & (before >= 0))
    for r in moved:
        out.append(
            Event(
                kind="tier_change", region=ev.regions[r], date=day, tier=int(tier[r]),
                previous=int(before[r]), signal=None, sentence=ev.explain(int(r), d).sentence,
                policy=ev.ruleset.name,
            )
        )
    shown = ev.prepare[:, :, d]
    started = shown & ~(ev.prepare[:, :, d - 1] if d else np.zeros_like(shown))
    for s, r in zip(*np.nonzero(started), strict=True):
        sig = ev.ruleset.prepare[s]
        out.append(
            Event(
                kind="prepare", region=ev.regions[r], date=day, tier=int(tier[r]), previous=None,
                signal=sig.id, policy=ev.ruleset.name,
                sentence=signal_message(ev, int(s), int(r), d) or f"signal {sig.id} active",
            )
        )
    return out


def sign(secret: str, body: bytes) -> str:
    """``sha256=<hex>``: HMAC-SHA256 of ``body`` keyed with ``secret`` (RFC 2104)."""
    return "sha256=" + hmac.new(secret.encode(), body, hashlib.sha256).hexdigest()


class _Retryable(Exception):
    pass


def _post(client: httpx.Client, recipient: Recipient, body: bytes) -> None:
    try:
        response = client.post(
            recipient.webhook or "", content=body,
            headers={"Content-Type": "application/json", SIGNATURE_HEADER: sign(recipient.secret,
                                                                                 body)},
        )
    except httpx.TransportError as exc:
        raise _Retryable(f"{type(exc).__name__}: {exc}") from exc
    if response.status_code >= 500:
        raise _Retryable(f"HTTP {response.status_code}")
    if response.status_code >= 400:
        raise RuntimeError(f"HTTP {response.status_code}")


def _webhook(config: NotifyConfig, recipient: Recipient, events: list[Event]) -> Delivery:
    body = json.dumps({"events": [e.as_json() for e in events]}, sort_keys=True).encode()
    attempts = 0
    try:
        with httpx.Client(timeout=10.0) as client:
            for attempt in Retrying(
                stop=stop_after_attempt(config.attempts),
                wait=wait_exponential(multiplier=config.backoff_seconds, max=60),
                retry=retry_if_exception_type(_Retryable), reraise=True,
            ):
                with attempt:
                    attempts += 1
                    _post(client, recipient, body)
    except (_Retryable, RuntimeError) as exc:
        log.warning("webhook %s failed after %d attempt(s): %s", recipient.id, attempts, exc)
        return Delivery(recipient=recipient.id, events=len(events), ok=False, attempts=attempts,
                        error=str(exc))
    return Delivery(recipient=recipient.id, events=len(events), ok=True, attempts=attempts)


def _email(config: NotifyConfig, recipient: Recipient, events: list[Event]) -> Delivery:
    msg = EmailMessage()
    changes = sum(e.kind == "tier_change" for e in events)
    signals = len(events) - changes
    msg["Subject"] = f"tierwise: {changes} tier change(s), {signals} prepare signal(s)"
    msg["From"] = config.smtp.sender
    msg["To"] = recipient.email or ""
    lines = [f"{e.date} {e.region}: {f'[{e.policy}] ' if e.policy else ''}{e.sentence}"
             for e in events]
    msg.set_content("\n".join(lines) + "\n")
    try:
        with smtplib.SMTP(config.smtp.host, config.smtp.port, timeout=config.smtp.timeout) as s:
            s.send_message(msg)
    except (OSError, smtplib.SMTPException) as exc:
        log.warning("e-mail to %s failed: %s", recipient.id, exc)
        return Delivery(recipient=recipient.id, events=len(events), ok=False, attempts=1,
                        error=str(exc))
    return Delivery(recipient=recipient.id, events=len(events), ok=True, attempts=1)


def deliver(
    events: Sequence[Event], config: NotifyConfig, *,
    skip: Mapping[str, set[str]] | None = None,
) -> list[Delivery]:
    """Send each recipient the events it wants (nothing when it wants none).

    ``skip`` maps a recipient id to event keys it must not get again (:attr:`Event.key`).
    """
    out = []
    for recipient in config.recipients:
        done = (skip or {}).get(recipient.id, set())
        mine = [e for e in events if recipient.wants(e) and e.key not in done]
        if not mine:
            continue
        send = _webhook if recipient.webhook else _email
        keys = tuple(e.key for e in mine)
        try:
            delivery = send(config, recipient, mine)
        except Exception as exc:  # e.g. a malformed URL: one recipient never stops the others
            log.warning("notification to %s failed: %s", recipient.id, exc)
            delivery = Delivery(recipient=recipient.id, events=len(mine), ok=False, attempts=0,
                                error=f"{type(exc).__name__}: {exc}")
        out.append(replace(delivery, keys=keys))
    return out


def sent_keys(*, session: Session, recipients: Sequence[str]) -> dict[str, set[str]]:
    """Keys of the once-only events already sent to each recipient (from ``notify.sent``)."""
    out: dict[str, set[str]] = {r: set() for r in recipients}
    query = select(AuditEntry.subject, AuditEntry.details).where(
        AuditEntry.action == "notify.sent", AuditEntry.subject.in_(list(recipients))
    )
    for subject, details in session.execute(query):
        out[subject].update(str(k) for k in (details or {}).get("sent", ()))
    return out


def deliver_and_record(
    events: Sequence[Event], config: NotifyConfig | None, *, session: Session, actor: str,
    context: str,
) -> tuple[Delivery, ...]:
    """Deliver ``events`` and write one audit entry per recipient; never raises.

    Nothing happens without a ``config`` or without events. A ``tier_change`` or ``prepare``
    event already sent to a recipient (its key in an earlier ``notify.sent`` entry) is not sent
    to it again. Each recipient's outcome is audited as ``notify.sent`` (with the keys of the
    once-only events it carried) or ``notify.failed`` (with the error), ``context`` saying what
    caused it (``evaluation``, ``publication``). An unexpected error while delivering is logged
    and audited as ``notify.failed`` for recipient ``*``, so the caller's work always goes on.
    """
    if config is None or not events:
        return ()
    try:
        done = sent_keys(session=session, recipients=[r.id for r in config.recipients])
        deliveries = tuple(deliver(events, config, skip=done))
    except Exception as exc:  # a notification must never break the caller's work
        log.exception("notifications for %s failed", context)
        deliveries = (
            Delivery(recipient="*", events=len(events), ok=False, attempts=0,
                     error=f"{type(exc).__name__}: {exc}"),
        )
    for d in deliveries:
        if not d.ok:
            log.warning("notification to %s (%s) failed: %s", d.recipient, context, d.error)
        record(
            session=session, actor=actor, action="notify.sent" if d.ok else "notify.failed",
            subject=d.recipient,
            details={"context": context, "events": d.events, "attempts": d.attempts,
                     "error": d.error,
                     "sent": [k for k in d.keys if k.split("|", 1)[0] in ONCE_KINDS]
                     if d.ok else []},
        )
    return deliveries
