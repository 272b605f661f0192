"""Delivery of a run's alerts to a webhook and an e-mail server on 127.0.0.1, through run_monitor.

The source holds GENERATED TEST DATA (tests/_alerting_fixtures.py) with one day
without rows (2030-03-03).  The run of 2030-03-04 then finds no new rows and, with
``min_rows = 175`` against the 180 rows a full 30-day window holds, too few rows:
two data-problem alerts open in one run, so each target gets ONE message grouping
both.  The next run has new rows again: a resolve message follows.
"""

from __future__ import annotations

import email
import json
from email import policy as email_policy
from pathlib import Path

import pandas as pd
import pytest
import sqlalchemy as sa
from _alerting_fixtures import (
    MailReceiver,
    WebhookReceiver,
    at,
    generated_rows,
    signature,
    spec_text,
    write_parquet_folder,
)
from threadpoolctl import threadpool_limits

from monitor.cli import main
from monitor.runs._build import open_store
from monitor.runs.run import run_monitor
from monitor.runs.spec import load_spec

pytestmark = pytest.mark.filterwarnings("ignore:ks_2samp:RuntimeWarning")

SECRET = "generated-test-secret"
NIGHTS = ["2030-03-01", "2030-03-02", "2030-03-03", "2030-03-04", "2030-03-05"]


@pytest.fixture(autouse=True)
def _one_blas_thread():
    with threadpool_limits(limits=1, user_api="blas"):
        yield


@pytest.fixture
def receivers(monkeypatch):
    hook, mail = WebhookReceiver(), MailReceiver()
    monkeypatch.setenv("RW_TEST_HOOK_URL", hook.url)
    monkeypatch.setenv("RW_TEST_HOOK_SECRET", SECRET)
    yield hook, mail
    hook.stop()
    mail.stop()


@pytest.fixture
def spec_path(tmp_path: Path, receivers) -> Path:
    rows = generated_rows(gaps=[(at("2030-03-03"), at("2030-03-04"))])
    write_parquet_folder(rows, tmp_path / "rows")
    _, mail = receivers
    notify = f'''
[[monitors.load.notify]]
kind = "webhook"
name = "ops-hook"
url_env = "RW_TEST_HOOK_URL"
secret_env = "RW_TEST_HOOK_SECRET"
timeout_seconds = 5

[[monitors.load.notify]]
kind = "email"
name = "ops-mail"
host = "127.0.0.1"
port = {mail.port}
security = "plain"
sender = "regwarden@example.org"
recipients = ["operator@example.org"]
'''
    path = tmp_path / "spec.toml"
    path.write_text(spec_text('kind = "parquet"\npath = "rows"\ntime_column = "at"',
                              notify=notify, alerts="min_rows = 175"))
    return path


def _bodies(hook: WebhookReceiver) -> list[tuple[dict[str, str], dict]]:
    return [(headers, json.loads(body)) for headers, body in hook.requests]


def test_each_run_sends_one_signed_grouped_message_per_target_then_a_resolve_message(
        spec_path: Path, receivers) -> None:
    hook, mail = receivers
    outcomes = [run_monitor(spec_path, "load", night) for night in NIGHTS]
    assert [o.status for o in outcomes] == ["completed"] * 5
    assert [len(o.alert_events) for o in outcomes] == [0, 0, 0, 2, 1]
    requests = _bodies(hook)
    assert len(requests) == 2  # one per run with events, not one per alert
    (first_headers, first), (second_headers, second) = requests
    # grouping: both alerts of the run of 03-04 in one message
    assert first["run_id"] == "2030-03-04T00:00Z" and first["monitor"] == "load"
    assert sorted((a["key"]["kind"], a["event"]) for a in first["alerts"]) == [
        ("data_no_new_rows", "opened"), ("data_too_few_rows", "opened")]
    assert all(a["severity"] == "warning" and a["state"] == "open" for a in first["alerts"])
    too_few = next(a for a in first["alerts"] if a["key"]["kind"] == "data_too_few_rows")
    assert too_few["evidence"]["statistic"] == 174 and too_few["evidence"]["threshold"] == 175
    assert "too few rows" in too_few["message"] and "174" in too_few["message"]
    # idempotency key in the header and the body; HMAC-SHA256 signature of the exact body
    for headers, body in requests:
        assert headers["Regwarden-Idempotency-Key"] == body["idempotency_key"]
    for headers, raw in hook.requests:
        assert headers["Regwarden-Signature"] == signature(raw, SECRET)
    # the resolve message
    assert second["run_id"] == "2030-03-05T00:00Z"
    assert [(a["key"]["kind"], a["event"], a["state"]) for a in second["alerts"]] == [
        ("data_no_new_rows", "resolved", "resolved")]
    assert second["alerts"][0]["message"].startswith("Resolved")
    # e-mail: the same two messages, each with its own key as Message-ID and header
    assert len(mail.envelopes) == 2
    mails = [email.message_from_bytes(e.content, policy=email_policy.default)
             for e in mail.envelopes]
    assert mails[0]["Subject"] == "[regwarden warning] load: 2 opened (run 2030-03-04T00:00Z)"
    assert "1 resolved" in mails[1]["Subject"]
    for message in mails:
        key = message["Regwarden-Idempotency-Key"]
        assert message["Message-ID"] == f"<{key}@regwarden>"
        assert message["To"] == "operator@example.org"
    text = mails[0].get_content()
    assert "no new rows arrived since the last run" in text and "not proof" in text
    assert {m["Regwarden-Idempotency-Key"] for m in mails}.isdisjoint(
        {h["Regwarden-Idempotency-Key"] for h, _ in requests})


def test_a_receiver_down_for_five_runs_loses_nothing_and_acknowledges_each_message_once(
        spec_path: Path, receivers, capsys) -> None:
    hook, mail = receivers
    assert run_monitor(spec_path, "load", "2030-03-01").status == "completed"
    hook.stop()
    mail.stop()
    down = [run_monitor(spec_path, "load", f"2030-03-0{day}") for day in range(2, 7)]
    assert [o.status for o in down] == ["completed"] * 5
    assert [o.delivery["failed"] for o in down] == [0, 0, 2, 4, 4]  # waiting messages pile up
    assert hook.requests == [] and mail.envelopes == []
    hook.start()
    mail.start()
    hook.fail_next = 1  # the first message is stored but its answer is lost: sent again
    back = run_monitor(spec_path, "load", "2030-03-07")
    assert back.delivery == {"delivered": 4, "failed": 0, "errors": [], "unknown_target": 0}
    store = open_store(load_spec(spec_path))
    try:
        outbox = pd.read_sql(sa.select(store.tables.deliveries), store.engine)
    finally:
        store.close()
    assert len(outbox) == 4 and outbox["delivered_at"].notna().all()
    assert (outbox["attempts"] >= 2).all()  # failed passes counted, then the delivery
    # oldest first, each message acknowledged exactly once; the lost answer's key came twice
    keys = list(outbox.sort_values("delivery_id")["idempotency_key"])
    hook_keys = [k for k in keys if k in set(hook.keys_seen())]
    assert hook.acknowledged == hook_keys and len(hook_keys) == 2
    assert hook.keys_seen() == [hook_keys[0], hook_keys[0], hook_keys[1]]
    assert [b["run_id"] for b in hook.accepted.values()] == ["2030-03-04T00:00Z",
                                                             "2030-03-05T00:00Z"]
    mail_keys = [email.message_from_bytes(e.content, policy=email_policy.default)[
        "Regwarden-Idempotency-Key"] for e in mail.envelopes]
    assert mail_keys == [k for k in keys if k not in hook_keys]
    # nothing is sent again: neither by the deliver command nor by the next run
    assert main(["deliver", str(spec_path), "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out)["deliveries"][0]["delivered"] == 0
    assert run_monitor(spec_path, "load", "2030-03-08").delivery["delivered"] == 0
    assert len(hook.requests) == 3 and len(mail.envelopes) == 2


def test_the_deliver_command_sends_what_waits_and_exits_3_while_a_target_refuses(
        spec_path: Path, receivers, capsys) -> None:
    hook, mail = receivers
    hook.stop()
    for night in NIGHTS[:4]:
        run_monitor(spec_path, "load", night, deliver=False)
    assert main(["deliver", str(spec_path)]) == 3  # the webhook is down
    assert "unreachable" in capsys.readouterr().out
    assert len(mail.envelopes) == 1
    hook.start()
    assert main(["deliver", str(spec_path), "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out)["deliveries"] == [
        {"monitor": "load", "delivered": 1, "failed": 0, "errors": [], "unknown_target": 0}]
    assert len(hook.acknowledged) == 1 and len(mail.envelopes) == 1
