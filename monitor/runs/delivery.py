"""Delivery of alert messages through an outbox, at least once.

The flow of one run::

    alert events ──build_messages──▶ one Message per target (the run's events grouped)
                                        │  written to the outbox together with the alerts
                                        ▼
    deliver_pending(outbox, targets) ──▶ send each due message; on failure retry a few
                                        times, then record the failure and the next
                                        attempt time (exponential backoff with jitter);
                                        the next run, or ``regwarden deliver``, tries again

Delivery is at least once: a message may reach a receiver twice (for example
when the receiver stored it but its answer was lost), so every message carries
an idempotency key (header ``Regwarden-Idempotency-Key`` for webhooks, the
``Message-ID`` for e-mail, a field of the JSON body everywhere) and the receiver
drops a key it has seen.  A message the receiver acknowledged (HTTP 2xx, SMTP
250) is marked delivered and never sent again.

Secrets (the webhook's HMAC key, SMTP credentials) are read from environment
variables named in the target, at send time.

The outbox is a small protocol (:class:`Outbox`); :class:`MemoryOutbox` serves
tests and ETL jobs without a store, and the history store's deliveries table
implements the same methods.
"""

from __future__ import annotations

import hashlib
import hmac
import importlib
import json
import logging
import os
import random
import smtplib
import ssl
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime, timedelta
from email.message import EmailMessage
from email.utils import format_datetime
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

from ..errors import ConfigurationError
from .rules import SEVERITIES, AlertEvent, severity_at_least

__all__ = [
    "CallableTarget",
    "DeliveryReport",
    "EmailTarget",
    "JsonLinesTarget",
    "LogTarget",
    "MemoryOutbox",
    "Message",
    "Outbox",
    "PendingDelivery",
    "RetryPolicy",
    "SendError",
    "Target",
    "WebhookTarget",
    "build_messages",
    "deliver_pending",
    "idempotency_key",
    "signature_of",
]

logger = logging.getLogger(__name__)

IDEMPOTENCY_HEADER = "Regwarden-Idempotency-Key"
SIGNATURE_HEADER = "Regwarden-Signature"
#: version of the message body's shape (a field of every body)
MESSAGE_VERSION = 1


class SendError(Exception):
    """One attempt to send a message failed (the message stays pending)."""


# ----------------------------------------------------------------------------- messages


@dataclass(frozen=True, slots=True)
class Message:
    """One message to one target: the events of one run that the target's routing lets through.

    ``alerts`` holds plain dicts (alert id, key, event, severity, state,
    message, evidence), so the message serialises as it is.
    """

    idempotency_key: str
    monitor: str
    run_id: str
    target: str
    created_at: datetime
    alerts: tuple[Mapping[str, Any], ...]

    @property
    def severity(self) -> str:
        """The most serious severity among the message's alerts."""
        return max((a["severity"] for a in self.alerts), key=SEVERITIES.index, default="info")

    @property
    def subject(self) -> str:
        counts: dict[str, int] = {}
        for alert in self.alerts:
            counts[alert["event"]] = counts.get(alert["event"], 0) + 1
        summary = ", ".join(f"{count} {event}" for event, count in sorted(counts.items()))
        return f"[regwarden {self.severity}] {self.monitor}: {summary} (run {self.run_id})"

    def to_dict(self) -> dict[str, Any]:
        return {"message_version": MESSAGE_VERSION, "idempotency_key": self.idempotency_key,
                "monitor": self.monitor, "run_id": self.run_id, "target": self.target,
                "created_at": self.created_at.isoformat(), "severity": self.severity,
                "subject": self.subject, "alerts": [dict(a) for a in self.alerts],
                "notice": "An alert is statistical evidence, not proof; people who know "
                          "the data decide what to do."}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Message:
        return cls(str(data["idempotency_key"]), str(data["monitor"]), str(data["run_id"]),
                   str(data["target"]), datetime.fromisoformat(str(data["created_at"])),
                   tuple(dict(a) for a in data["alerts"]))

    def body(self) -> bytes:
        """The JSON body (keys sorted, UTF-8): what webhooks receive and signatures cover."""
        return json.dumps(self.to_dict(), sort_keys=True, ensure_ascii=False,
                          separators=(",", ":")).encode("utf-8")

    def text(self) -> str:
        """Plain-text layout for e-mail and logs."""
        lines = [self.subject, ""]
        for alert in self.alerts:
            lines.append(f"* {alert['event'].upper()} [{alert['severity']}] {alert['message']}")
            lines.append(f"  alert {alert['alert_id']}, state {alert['state']}")
        lines += ["", "An alert is statistical evidence, not proof; people who know the data "
                  "decide what to do.",
                  f"Message key {self.idempotency_key}; run {self.run_id}; "
                  f"created {self.created_at.isoformat()}."]
        return "\n".join(lines) + "\n"


def idempotency_key(monitor: str, run_id: str, target: str,
                    alerts: Iterable[tuple[str, str, str]]) -> str:
    """Stable key of (monitor, run, target, sorted (alert id, event, state)): 32 hex digits."""
    canonical = json.dumps([monitor, run_id, target, sorted(list(a) for a in alerts)],
                           separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()[:32]


def _alert_entry(event: AlertEvent) -> dict[str, Any]:
    record = event.record
    return {"alert_id": record.alert_id, "key": record.key.to_dict(), "event": event.event,
            "severity": record.severity, "state": record.state, "message": record.message,
            "evidence": None if record.evidence is None else record.evidence.to_dict(),
            "opened_run": record.opened_run, "resolved_run": record.resolved_run}


def build_messages(events: Sequence[AlertEvent], targets: Sequence[Target], *, monitor: str,
                   run_id: str, created_at: datetime) -> list[Message]:
    """One message per target for the run, grouping the events its routing lets through.

    A target receives an event when the alert's severity is at least the
    target's ``minimum_severity`` (a resolve message is routed by the severity
    the alert had).  Targets with nothing to receive get no message.
    """
    messages = []
    for target in targets:
        entries = [_alert_entry(event) for event in events
                   if severity_at_least(event.record.severity, target.minimum_severity)]
        if not entries:
            continue
        entries.sort(key=lambda e: (e["event"] != "resolved", e["alert_id"]))
        key = idempotency_key(monitor, run_id, target.name,
                              [(e["alert_id"], e["event"], e["state"]) for e in entries])
        messages.append(Message(key, monitor, run_id, target.name, created_at, tuple(entries)))
    return messages


# ----------------------------------------------------------------------------- targets


def signature_of(body: bytes, secret: str) -> str:
    """Value of the signature header: ``sha256=`` + hex HMAC-SHA256 of the body."""
    return "sha256=" + hmac.new(secret.encode("utf-8"), body, hashlib.sha256).hexdigest()


class Target(Protocol):
    """Where messages go.  ``send`` returns a short receipt or raises :class:`SendError`."""

    name: str
    minimum_severity: str

    def send(self, message: Message, environ: Mapping[str, str]) -> str: ...


def _check_severity(name: str, severity: str) -> None:
    if severity not in SEVERITIES:
        raise ConfigurationError(f"minimum_severity must be one of {SEVERITIES}, got "
                                 f"{severity!r}", where=f"delivery target {name!r}")


_LOG_LEVELS = {"info": logging.INFO, "warning": logging.WARNING, "critical": logging.CRITICAL}


@dataclass(frozen=True, slots=True)
class LogTarget:
    """Writes each message to the ``monitor.runs.delivery`` logger, one record per alert."""

    name: str = "log"
    minimum_severity: str = "info"

    def __post_init__(self) -> None:
        _check_severity(self.name, self.minimum_severity)

    def send(self, message: Message, environ: Mapping[str, str]) -> str:
        for alert in message.alerts:
            logger.log(_LOG_LEVELS[alert["severity"]], "%s %s [%s] %s (key %s)", message.monitor,
                       alert["event"], alert["severity"], alert["message"],
                       message.idempotency_key)
        return "logged"


@dataclass(frozen=True, slots=True)
class JsonLinesTarget:
    """Appends each message as one JSON line to a file (flushed and synced)."""

    name: str
    path: str
    minimum_severity: str = "info"

    def __post_init__(self) -> None:
        _check_severity(self.name, self.minimum_severity)

    def send(self, message: Message, environ: Mapping[str, str]) -> str:
        line = json.dumps(message.to_dict(), sort_keys=True, ensure_ascii=False) + "\n"
        try:
            path = Path(self.path)
            path.parent.mkdir(parents=True, exist_ok=True)
            with path.open("a", encoding="utf-8") as handle:
                handle.write(line)
                handle.flush()
                os.fsync(handle.fileno())
        except OSError as error:
            raise SendError(f"cannot append to {self.path}: {error}") from error
        return f"appended to {self.path}"


@dataclass(frozen=True, slots=True)
class WebhookTarget:
    """HTTP POST of the JSON body.

    Headers: ``Content-Type: application/json``, ``Regwarden-Idempotency-Key``,
    and ``Regwarden-Signature: sha256=<hex HMAC-SHA256 of the body>`` when the
    environment variable named by ``secret_variable`` is set.  Any 2xx answer
    acknowledges the message; anything else (or no answer within
    ``timeout_seconds``) is a failed attempt.
    """

    name: str
    url: str
    minimum_severity: str = "info"
    timeout_seconds: float = 10.0
    secret_variable: str = ""

    def __post_init__(self) -> None:
        _check_severity(self.name, self.minimum_severity)
        if not self.url.startswith(("http://", "https://")):
            raise ConfigurationError(f"webhook url must start with http:// or https://, got "
                                     f"{self.url!r}", where=f"delivery target {self.name!r}")
        if not self.timeout_seconds > 0:
            raise ConfigurationError(f"timeout_seconds must be positive, got "
                                     f"{self.timeout_seconds}",
                                     where=f"delivery target {self.name!r}")

    def send(self, message: Message, environ: Mapping[str, str]) -> str:
        body = message.body()
        headers = {"Content-Type": "application/json; charset=utf-8",
                   IDEMPOTENCY_HEADER: message.idempotency_key,
                   "User-Agent": "regwarden"}
        if self.secret_variable:
            secret = environ.get(self.secret_variable)
            if not secret:
                raise SendError(f"environment variable {self.secret_variable} (the webhook "
                                f"secret of target {self.name!r}) is not set")
            headers[SIGNATURE_HEADER] = signature_of(body, secret)
        request = urllib.request.Request(self.url, data=body, headers=headers, method="POST")
        try:
            with urllib.request.urlopen(request, timeout=self.timeout_seconds) as response:
                status = response.status
        except urllib.error.HTTPError as error:
            raise SendError(f"{self.url} answered HTTP {error.code}") from error
        except (urllib.error.URLError, OSError) as error:
            raise SendError(f"{self.url} unreachable: {error}") from error
        if not 200 <= status < 300:
            raise SendError(f"{self.url} answered HTTP {status}")
        return f"HTTP {status}"


@dataclass(frozen=True, slots=True)
class EmailTarget:
    """E-mail over SMTP with our own plain-text layout.

    ``security`` is "starttls" (upgrade a plain connection, the usual port 587),
    "ssl" (TLS from the start, port 465) or "plain" (no encryption: only for a
    relay on the same host).  Credentials come from the environment variables
    named by ``username_variable`` / ``password_variable`` (no login when unset).
    The ``Message-ID`` is derived from the idempotency key, which is also sent
    as a header of its own.
    """

    name: str
    host: str
    sender: str
    recipients: tuple[str, ...]
    port: int = 587
    security: str = "starttls"
    username_variable: str = ""
    password_variable: str = ""
    minimum_severity: str = "warning"
    timeout_seconds: float = 30.0

    def __post_init__(self) -> None:
        _check_severity(self.name, self.minimum_severity)
        where = f"delivery target {self.name!r}"
        if self.security not in ("starttls", "ssl", "plain"):
            raise ConfigurationError(f"security must be starttls, ssl or plain, got "
                                     f"{self.security!r}", where=where)
        if not self.recipients:
            raise ConfigurationError("an e-mail target needs at least one recipient", where=where)

    def compose(self, message: Message) -> EmailMessage:
        email = EmailMessage()
        email["Subject"] = message.subject
        email["From"] = self.sender
        email["To"] = ", ".join(self.recipients)
        email["Date"] = format_datetime(message.created_at)
        email["Message-ID"] = f"<{message.idempotency_key}@regwarden>"
        email[IDEMPOTENCY_HEADER] = message.idempotency_key
        email.set_content(message.text())
        return email

    def send(self, message: Message, environ: Mapping[str, str]) -> str:
        email = self.compose(message)
        try:
            if self.security == "ssl":
                client: smtplib.SMTP = smtplib.SMTP_SSL(
                    self.host, self.port, timeout=self.timeout_seconds,
                    context=ssl.create_default_context())
            else:
                client = smtplib.SMTP(self.host, self.port, timeout=self.timeout_seconds)
            with client:
                if self.security == "starttls":
                    client.starttls(context=ssl.create_default_context())
                username = environ.get(self.username_variable) if self.username_variable else None
                if username:
                    client.login(username, environ.get(self.password_variable, ""))
                refused = client.send_message(email)
        except (smtplib.SMTPException, OSError) as error:
            raise SendError(f"SMTP {self.host}:{self.port}: {error}") from error
        if refused:
            raise SendError(f"SMTP {self.host}:{self.port} refused {sorted(refused)}")
        return "SMTP 250"


@dataclass(frozen=True, slots=True)
class CallableTarget:
    """Calls a Python function with the message as a plain dict (for ETL jobs).

    Give the function itself, or ``function_path`` as ``"package.module:name"``.
    Returning normally acknowledges; raising is a failed attempt.
    """

    name: str
    function: Callable[[dict[str, Any]], Any] | None = None
    function_path: str = ""
    minimum_severity: str = "info"

    def __post_init__(self) -> None:
        _check_severity(self.name, self.minimum_severity)
        if self.function is None:
            module_name, _, attribute = self.function_path.partition(":")
            where = f"delivery target {self.name!r}"
            if not module_name or not attribute:
                raise ConfigurationError(f"function_path must look like 'package.module:name', "
                                         f"got {self.function_path!r}", where=where)
            try:
                function = getattr(importlib.import_module(module_name), attribute)
            except (ImportError, AttributeError) as error:
                raise ConfigurationError(f"cannot load {self.function_path!r}: {error}",
                                         where=where) from error
            object.__setattr__(self, "function", function)

    def send(self, message: Message, environ: Mapping[str, str]) -> str:
        assert self.function is not None
        try:
            self.function(message.to_dict())
        except Exception as error:  # the user's code: any failure means "not delivered"
            raise SendError(f"{self.name} raised {type(error).__name__}: {error}") from error
        return "called"


# ----------------------------------------------------------------------------- outbox


@dataclass(frozen=True, slots=True)
class PendingDelivery:
    """A message waiting in the outbox, with its delivery bookkeeping."""

    message: Message
    attempts: int = 0
    next_attempt_at: datetime | None = None
    last_error: str = ""
    delivered_at: datetime | None = None
    receipt: str = ""


@runtime_checkable
class Outbox(Protocol):
    """What delivery needs from a store of messages.

    Implementations must make ``mark_delivered`` final: a delivered message is
    never returned by ``due`` again.  ``add`` ignores a message whose
    idempotency key is already present (so a retried run does not duplicate).
    """

    def add(self, messages: Sequence[Message]) -> None: ...

    def due(self, now: datetime) -> list[PendingDelivery]:
        """Undelivered messages whose next attempt time is not after ``now``, oldest first."""
        ...

    def mark_failed(self, key: str, *, attempted_at: datetime, error: str,
                    next_attempt_at: datetime) -> None: ...

    def mark_delivered(self, key: str, *, delivered_at: datetime, receipt: str) -> None: ...


class MemoryOutbox:
    """An outbox in memory (tests, and ETL jobs that keep no history store)."""

    def __init__(self) -> None:
        self._items: dict[str, PendingDelivery] = {}

    def add(self, messages: Sequence[Message]) -> None:
        for message in messages:
            self._items.setdefault(message.idempotency_key, PendingDelivery(message))

    def due(self, now: datetime) -> list[PendingDelivery]:
        waiting = [item for item in self._items.values() if item.delivered_at is None
                   and (item.next_attempt_at is None or item.next_attempt_at <= now)]
        return sorted(waiting, key=lambda item: (item.message.created_at,
                                                 item.message.idempotency_key))

    def mark_failed(self, key: str, *, attempted_at: datetime, error: str,
                    next_attempt_at: datetime) -> None:
        item = self._items[key]
        self._items[key] = replace(item, attempts=item.attempts + 1, last_error=error,
                                   next_attempt_at=next_attempt_at)

    def mark_delivered(self, key: str, *, delivered_at: datetime, receipt: str) -> None:
        item = self._items[key]
        if item.delivered_at is None:
            self._items[key] = replace(item, attempts=item.attempts + 1,
                                       delivered_at=delivered_at, receipt=receipt)

    def all(self) -> list[PendingDelivery]:
        return list(self._items.values())


@dataclass(frozen=True, slots=True)
class RetryPolicy:
    """Retries within one delivery pass and backoff between passes.

    Within a pass a message is tried ``attempts_per_pass`` times, waiting
    ``pause_seconds × 2^i`` between tries.  After a failed pass its next attempt
    is ``base_delay × 2^(failed passes − 1)``, capped at ``max_delay``, times a
    jitter factor drawn uniformly from [1 − jitter, 1 + jitter].
    """

    attempts_per_pass: int = 3
    pause_seconds: float = 1.0
    base_delay: timedelta = timedelta(minutes=5)
    max_delay: timedelta = timedelta(hours=6)
    jitter: float = 0.2

    def delay_after(self, failed_passes: int, rng: random.Random) -> timedelta:
        exponent = min(max(failed_passes - 1, 0), 30)
        seconds = min(self.max_delay.total_seconds(),
                      self.base_delay.total_seconds() * 2.0**exponent)
        return timedelta(seconds=seconds * rng.uniform(1 - self.jitter, 1 + self.jitter))


@dataclass(frozen=True, slots=True)
class DeliveryReport:
    """What one delivery pass did: idempotency keys delivered, failed (with reasons), skipped."""

    delivered: tuple[str, ...] = ()
    failed: tuple[tuple[str, str], ...] = ()
    unknown_target: tuple[str, ...] = ()

    @property
    def is_complete(self) -> bool:
        return not self.failed and not self.unknown_target


def deliver_pending(
    outbox: Outbox,
    targets: Sequence[Target],
    *,
    now: datetime,
    retry: RetryPolicy = RetryPolicy(),
    environ: Mapping[str, str] | None = None,
    rng: random.Random | None = None,
    sleep: Callable[[float], None] = time.sleep,
) -> DeliveryReport:
    """Send every due message of the outbox to its target.

    ``now``, ``rng`` (jitter) and ``sleep`` are injectable so tests need no
    clock and no waiting.  A message for a target no longer configured stays
    pending and is reported.
    """
    environment = os.environ if environ is None else environ
    generator = rng or random.Random()
    by_name = {target.name: target for target in targets}
    delivered: list[str] = []
    failed: list[tuple[str, str]] = []
    unknown: list[str] = []
    for item in outbox.due(now):
        message = item.message
        target = by_name.get(message.target)
        if target is None:
            unknown.append(message.idempotency_key)
            continue
        error = ""
        for attempt in range(retry.attempts_per_pass):
            if attempt:
                sleep(retry.pause_seconds * 2.0 ** (attempt - 1))
            try:
                receipt = target.send(message, environment)
            except SendError as problem:
                error = str(problem)
                logger.warning("delivery of %s to %r failed (try %d of %d): %s",
                               message.idempotency_key, target.name, attempt + 1,
                               retry.attempts_per_pass, problem)
                continue
            outbox.mark_delivered(message.idempotency_key, delivered_at=now, receipt=receipt)
            delivered.append(message.idempotency_key)
            break
        else:
            passes = item.attempts + 1
            outbox.mark_failed(message.idempotency_key, attempted_at=now, error=error,
                               next_attempt_at=now + retry.delay_after(passes, generator))
            failed.append((message.idempotency_key, error))
    return DeliveryReport(tuple(delivered), tuple(failed), tuple(unknown))


def utc_now() -> datetime:
    """The current time, timezone-aware (for shells; the core takes time as an argument)."""
    return datetime.now(UTC)

