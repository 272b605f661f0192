"""Delivery through the outbox against real loopback servers (HTTP and SMTP)."""

from __future__ import annotations

import email
import hashlib
import hmac
import json
import logging
import random
import socket
import threading
from datetime import UTC, datetime, timedelta
from email import policy as email_policy
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import pytest

from monitor.errors import ConfigurationError
from monitor.runs.delivery import (
    CallableTarget,
    EmailTarget,
    JsonLinesTarget,
    LogTarget,
    MemoryOutbox,
    Message,
    Outbox,
    RetryPolicy,
    WebhookTarget,
    build_messages,
    deliver_pending,
    idempotency_key,
)
from monitor.runs.rules import AlertEvent, AlertRecord, Condition, Persistence, apply_rules

START = datetime(2031, 6, 1, 2, 0, tzinfo=UTC)
PERSIST = {m: Persistence(1, 1, 1) for m in ("sequential", "window", "data", "schedule")}
NO_WAIT = RetryPolicy(attempts_per_pass=2, pause_seconds=0.0)


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


class Receiver:
    """A small webhook receiver on 127.0.0.1 that acknowledges and de-duplicates by key."""

    def __init__(self, port: int, fail_first: int = 0) -> None:
        self.port = port
        self.requests: list[tuple[dict[str, str], bytes]] = []
        self.accepted: dict[str, dict] = {}
        self.fail_first = fail_first
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802 (http.server's naming)
                body = self.rfile.read(int(self.headers["Content-Length"]))
                receiver.requests.append((dict(self.headers), body))
                if receiver.fail_first > 0:
                    receiver.fail_first -= 1
                    self.send_response(503)
                    self.end_headers()
                    return
                key = self.headers["Regwarden-Idempotency-Key"]
                receiver.accepted.setdefault(key, json.loads(body))
                self.send_response(200)
                self.end_headers()

            def log_message(self, *args: object) -> None:
                return

        self.server = ThreadingHTTPServer(("127.0.0.1", port), Handler)
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}/hook"

    def stop(self) -> None:
        self.server.shutdown()
        self.server.server_close()
        self.thread.join()


@pytest.fixture
def receiver():
    server = Receiver(_free_port())
    yield server
    server.stop()


@pytest.fixture
def smtp_server():
    from aiosmtpd.controller import Controller

    class Collect:
        def __init__(self) -> None:
            self.envelopes = []

        async def handle_DATA(self, server, session, envelope):  # noqa: N802 (aiosmtpd API)
            self.envelopes.append(envelope)
            return "250 Message accepted for delivery"

    handler = Collect()
    controller = Controller(handler, hostname="127.0.0.1", port=_free_port())
    controller.start()
    yield controller, handler
    controller.stop()


def _events(night: int, *, resolve: bool = False) -> list[AlertEvent]:
    """A run with a critical sequential alert and a warning window alert (or their resolution)."""
    verdict = "clean" if resolve else "breached"
    conditions = [
        Condition("fit_degraded", verdict, "sequential", model="load ~ temp",
                  statistic_name="forecast error size CUSUM", statistic=21.0, threshold=19.4),
        Condition("assumption_normality", verdict, "window", model="load ~ temp",
                  statistic_name="Jarque-Bera", statistic=30.0,
                  p_value=0.6 if resolve else 1e-7),
    ]
    records: list[AlertRecord] = []
    if resolve:
        records = list(apply_rules([], [c.__class__(**{**c.to_dict(), "verdict": "breached",
                                                        "p_value": c.p_value and 1e-7})
                                        for c in conditions], monitor="heat", run_id="r0",
                                   run_at=START, persistence=PERSIST).records)
    outcome = apply_rules(records, conditions, monitor="heat", run_id=f"r{night}",
                          run_at=START + timedelta(days=night), persistence=PERSIST)
    return list(outcome.events)


# ----------------------------------------------------------------------------- messages


def test_one_message_per_target_groups_the_runs_alerts_and_routes_by_severity():
    events = _events(1)
    targets = [LogTarget(), WebhookTarget("pager", "http://127.0.0.1:9/x",
                                          minimum_severity="critical")]
    messages = build_messages(events, targets, monitor="heat", run_id="r1", created_at=START)
    by_target = {m.target: m for m in messages}
    assert len(by_target["log"].alerts) == 2
    assert [a["key"]["kind"] for a in by_target["pager"].alerts] == ["fit_degraded"]
    assert by_target["pager"].subject == "[regwarden critical] heat: 1 opened (run r1)"
    # nothing passes a target's routing: no message at all
    assert build_messages([e for e in events if e.record.severity == "warning"],
                          targets[1:], monitor="heat", run_id="r1", created_at=START) == []


def test_idempotency_key_is_stable_and_changes_with_run_target_or_states():
    key = idempotency_key("heat", "r1", "pager", [("a#1", "opened", "open")])
    assert key == idempotency_key("heat", "r1", "pager", [("a#1", "opened", "open")])
    assert len(key) == 32
    assert key != idempotency_key("heat", "r2", "pager", [("a#1", "opened", "open")])
    assert key != idempotency_key("heat", "r1", "mail", [("a#1", "opened", "open")])
    assert key != idempotency_key("heat", "r1", "pager", [("a#1", "resolved", "resolved")])
    message = build_messages(_events(1), [LogTarget()], monitor="heat", run_id="r1",
                             created_at=START)[0]
    assert Message.from_dict(message.to_dict()) == message


def test_memory_outbox_satisfies_the_outbox_protocol():
    assert isinstance(MemoryOutbox(), Outbox)


# ----------------------------------------------------------------------------- webhook


def test_webhook_posts_signed_json_with_the_idempotency_key(receiver):
    target = WebhookTarget("hook", receiver.url, secret_variable="HOOK_SECRET", timeout_seconds=5)
    outbox = MemoryOutbox()
    outbox.add(build_messages(_events(1), [target], monitor="heat", run_id="r1",
                              created_at=START))
    report = deliver_pending(outbox, [target], now=START, environ={"HOOK_SECRET": "s3cr3t"},
                             retry=NO_WAIT, rng=random.Random(1))
    assert report.is_complete and len(report.delivered) == 1
    headers, body = receiver.requests[0]
    key = report.delivered[0]
    assert headers["Regwarden-Idempotency-Key"] == key
    expected = "sha256=" + hmac.new(b"s3cr3t", body, hashlib.sha256).hexdigest()
    assert headers["Regwarden-Signature"] == expected
    payload = json.loads(body)
    assert payload["idempotency_key"] == key and payload["monitor"] == "heat"
    assert {a["key"]["kind"] for a in payload["alerts"]} == {"fit_degraded",
                                                             "assumption_normality"}
    assert all(a["event"] == "opened" for a in payload["alerts"])
    assert "not proof" in payload["notice"]
    # delivered is final: a second pass sends nothing
    again = deliver_pending(outbox, [target], now=START + timedelta(days=1),
                            environ={"HOOK_SECRET": "s3cr3t"}, retry=NO_WAIT)
    assert again.delivered == () and len(receiver.requests) == 1


def test_webhook_without_secret_sends_no_signature_and_resolve_message_arrives(receiver):
    target = WebhookTarget("hook", receiver.url)
    outbox = MemoryOutbox()
    outbox.add(build_messages(_events(2, resolve=True), [target], monitor="heat", run_id="r2",
                              created_at=START))
    deliver_pending(outbox, [target], now=START, environ={}, retry=NO_WAIT)
    headers, body = receiver.requests[0]
    assert "Regwarden-Signature" not in headers
    alerts = json.loads(body)["alerts"]
    assert {a["event"] for a in alerts} == {"resolved"}
    assert all(a["message"].startswith("Resolved in model 'load ~ temp'") for a in alerts)


def test_missing_secret_variable_keeps_the_message_pending(receiver):
    target = WebhookTarget("hook", receiver.url, secret_variable="ABSENT_SECRET")
    outbox = MemoryOutbox()
    outbox.add(build_messages(_events(1), [target], monitor="heat", run_id="r1",
                              created_at=START))
    report = deliver_pending(outbox, [target], now=START, environ={}, retry=NO_WAIT)
    assert "ABSENT_SECRET" in report.failed[0][1] and receiver.requests == []


def test_receiver_down_for_five_runs_loses_nothing_and_acknowledges_each_once():
    port = _free_port()
    target = WebhookTarget("hook", f"http://127.0.0.1:{port}/hook", timeout_seconds=2)
    outbox = MemoryOutbox()
    rng = random.Random(7)
    keys = []
    for night in range(1, 6):  # nobody listens on the port
        now = START + timedelta(days=night)
        messages = build_messages(_events(night), [target], monitor="heat",
                                  run_id=f"r{night}", created_at=now)
        keys += [m.idempotency_key for m in messages]
        outbox.add(messages)
        report = deliver_pending(outbox, [target], now=now, retry=NO_WAIT, rng=rng, environ={})
        assert report.delivered == () and len(report.failed) == night
    pending = {item.message.idempotency_key: item for item in outbox.all()}
    assert set(pending) == set(keys)
    assert [pending[k].attempts for k in keys] == [5, 4, 3, 2, 1]
    assert all("unreachable" in item.last_error for item in pending.values())
    # the receiver comes back; the sixth run (and a later delivery pass) clears the backlog
    server = Receiver(port, fail_first=1)  # its first answer is lost work: 503, resent later
    try:
        now = START + timedelta(days=6)
        messages = build_messages(_events(6), [target], monitor="heat", run_id="r6",
                                  created_at=now)
        keys += [m.idempotency_key for m in messages]
        outbox.add(messages)
        deliver_pending(outbox, [target], now=now, retry=NO_WAIT, rng=rng, environ={})
        deliver_pending(outbox, [target], now=now + timedelta(days=1), retry=NO_WAIT,
                        rng=rng, environ={})
        assert set(server.accepted) == set(keys) and len(keys) == 6
        acknowledged = [h["Regwarden-Idempotency-Key"] for h, _ in server.requests[1:]]
        assert sorted(acknowledged) == sorted(keys)  # each acknowledged exactly once
        assert all(item.delivered_at is not None for item in outbox.all())
        final = deliver_pending(outbox, [target], now=now + timedelta(days=9), retry=NO_WAIT,
                                environ={})
        assert final.delivered == () and len(server.requests) == 7
    finally:
        server.stop()


def test_backoff_grows_exponentially_with_bounded_jitter():
    policy = RetryPolicy(base_delay=timedelta(minutes=5), max_delay=timedelta(hours=6),
                         jitter=0.2)
    rng = random.Random(3)
    for passes, minutes in [(1, 5), (2, 10), (3, 20), (8, 360), (40, 360)]:
        delay = policy.delay_after(passes, rng).total_seconds() / 60
        assert minutes * 0.8 <= delay <= minutes * 1.2


# ----------------------------------------------------------------------------- e-mail


def test_email_over_smtp_carries_the_layout_message_id_and_grouping(smtp_server):
    controller, handler = smtp_server
    target = EmailTarget("mail", "127.0.0.1", "regwarden@example.test",
                         ("oncall@example.test", "team@example.test"), port=controller.port,
                         security="plain", minimum_severity="warning")
    outbox = MemoryOutbox()
    outbox.add(build_messages(_events(1), [target], monitor="heat", run_id="r1",
                              created_at=START))
    report = deliver_pending(outbox, [target], now=START, retry=NO_WAIT, environ={})
    assert report.is_complete
    (envelope,) = handler.envelopes
    assert sorted(envelope.rcpt_tos) == ["oncall@example.test", "team@example.test"]
    parsed = email.message_from_bytes(envelope.content, policy=email_policy.default)
    key = report.delivered[0]
    assert parsed["Message-ID"] == f"<{key}@regwarden>"
    assert parsed["Regwarden-Idempotency-Key"] == key
    assert parsed["Subject"] == "[regwarden critical] heat: 2 opened (run r1)"
    text = parsed.get_content()
    assert text.count("* OPENED") == 2 and "statistical evidence, not proof" in text
    # resolve message
    outbox.add(build_messages(_events(2, resolve=True), [target], monitor="heat", run_id="r2",
                              created_at=START + timedelta(days=2)))
    deliver_pending(outbox, [target], now=START + timedelta(days=2), retry=NO_WAIT, environ={})
    resolved = email.message_from_bytes(handler.envelopes[1].content,
                                        policy=email_policy.default)
    assert "2 resolved" in resolved["Subject"] and "* RESOLVED" in resolved.get_content()


def test_email_with_starttls_against_a_server_without_tls_fails_and_stays_pending(smtp_server):
    controller, _ = smtp_server
    target = EmailTarget("mail", "127.0.0.1", "regwarden@example.test", ("a@example.test",),
                         port=controller.port, security="starttls")
    outbox = MemoryOutbox()
    outbox.add(build_messages(_events(1), [target], monitor="heat", run_id="r1",
                              created_at=START))
    report = deliver_pending(outbox, [target], now=START, retry=NO_WAIT, environ={})
    assert report.delivered == () and "STARTTLS" in report.failed[0][1].upper()
    assert outbox.due(START + timedelta(days=1))


def test_email_target_rejects_bad_configuration():
    with pytest.raises(ConfigurationError, match="security"):
        EmailTarget("mail", "h", "s@example.test", ("r@example.test",), security="tls13")
    with pytest.raises(ConfigurationError, match="recipient"):
        EmailTarget("mail", "h", "s@example.test", ())


# ----------------------------------------------------------------------------- the rest


def test_json_lines_log_and_callable_targets(tmp_path, caplog):
    received = []
    failing_once = {"left": 1}

    def etl_hook(message: dict) -> None:
        if failing_once["left"]:
            failing_once["left"] -= 1
            raise RuntimeError("warehouse busy")
        received.append(message)

    targets = [JsonLinesTarget("file", str(tmp_path / "out" / "alerts.jsonl")), LogTarget(),
               CallableTarget("etl", etl_hook)]
    outbox = MemoryOutbox()
    outbox.add(build_messages(_events(1), targets, monitor="heat", run_id="r1",
                              created_at=START))
    with caplog.at_level(logging.INFO, logger="monitor.runs.delivery"):
        report = deliver_pending(outbox, targets, now=START, retry=NO_WAIT, environ={})
    assert report.is_complete  # the callable succeeded on its second try
    lines = (tmp_path / "out" / "alerts.jsonl").read_text().splitlines()
    assert len(lines) == 1 and json.loads(lines[0])["run_id"] == "r1"
    assert len(received) == 1 and received[0]["target"] == "etl"
    critical = [r for r in caplog.records if r.levelno == logging.CRITICAL]
    assert len(critical) == 1 and "forecast error size CUSUM" in critical[0].getMessage()


def test_callable_target_loads_a_dotted_path_and_names_a_bad_one():
    target = CallableTarget("etl", function_path="json:dumps")
    assert target.function is json.dumps
    with pytest.raises(ConfigurationError, match="no_such_module"):
        CallableTarget("etl", function_path="no_such_module:f")


def test_message_for_a_target_no_longer_configured_stays_pending():
    outbox = MemoryOutbox()
    outbox.add(build_messages(_events(1), [LogTarget("old-log")], monitor="heat", run_id="r1",
                              created_at=START))
    report = deliver_pending(outbox, [LogTarget()], now=START, environ={})
    assert len(report.unknown_target) == 1 and not report.is_complete
    assert len(outbox.due(START)) == 1
