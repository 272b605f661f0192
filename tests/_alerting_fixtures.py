"""Helpers for the end-to-end alerting tests: generated data, specs, loopback receivers.

The rows written here are GENERATED TEST DATA, a seeded simulated linear process,
nothing measured: ``y = 2 + 1.5·x + 0.8·z + ε`` with standard normal inputs and
errors, one row every 4 hours.  A change can be planted: from ``change_at`` on, the
slope of ``x`` grows by 2.5 error standard deviations per standard deviation of
``x`` (large on purpose, so an alert opens within a run or two).  Gaps (days
without rows) can be left to raise data-problem alerts.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import json
import socket
import threading
from collections.abc import Sequence
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import numpy as np
import pandas as pd

UTC = dt.UTC
START = dt.datetime(2030, 1, 1, tzinfo=UTC)
END = dt.datetime(2030, 4, 1, tzinfo=UTC)


def at(text: str) -> dt.datetime:
    return dt.datetime.fromisoformat(text).replace(tzinfo=UTC)


def generated_rows(*, seed: int = 20301, change_at: dt.datetime | None = None,
                   gaps: Sequence[tuple[dt.datetime, dt.datetime]] = (),
                   segments: Sequence[str] = (), changed_segments: Sequence[str] = (),
                   start: dt.datetime = START, end: dt.datetime = END) -> pd.DataFrame:
    """GENERATED TEST DATA (see the module docstring); one block per segment."""
    rng = np.random.default_rng(seed)
    times = pd.date_range(start, end, freq="4h", tz="UTC", inclusive="left")
    frames = []
    for segment in segments or [""]:
        n = len(times)
        x = rng.normal(size=n)
        z = rng.normal(size=n)
        y = 2.0 + 1.5 * x + 0.8 * z + rng.normal(size=n)
        if change_at is not None and (not segments or segment in changed_segments):
            y = y + np.where(times >= pd.Timestamp(change_at), 2.5 * x, 0.0)
        frame = pd.DataFrame({"at": times, "x": x, "z": z, "y": y})
        if segments:
            frame["site"] = segment
        frames.append(frame)
    rows = pd.concat(frames, ignore_index=True).sort_values("at", kind="stable")
    for gap_start, gap_end in gaps:
        rows = rows[(rows["at"] < pd.Timestamp(gap_start)) | (rows["at"] >= pd.Timestamp(gap_end))]
    return rows.reset_index(drop=True)


def write_parquet_folder(rows: pd.DataFrame, folder: Path) -> Path:
    """One Parquet file per month in ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    for month, part in rows.groupby(rows["at"].dt.strftime("%Y-%m")):
        part.to_parquet(folder / f"rows-{month}.parquet", index=False)
    return folder


def spec_text(source: str, *, notify: str = "", alerts: str = "", segment: bool = False,
              store: str = "sqlite:///history.sqlite", extra: str = "") -> str:
    """A monitor spec named ``load`` with candidates ``only_x`` and ``both`` (chosen)."""
    return f"""
[history]
store = "{store}"

[monitors.load]
{'segment_column = "site"' if segment else ''}

[monitors.load.source]
{source}

[monitors.load.windows]
fresh = "30d"

[monitors.load.family]
response = "y"
chosen = "both"

[monitors.load.family.candidates]
only_x = "y ~ x"
both = "y ~ x + z"

[monitors.load.alerts]
rows_per_night = 6
{alerts}

[monitors.load.delivery]
tries_per_pass = 2
pause_seconds = 0
{extra}
{notify}
"""


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


class WebhookReceiver:
    """A webhook receiver on 127.0.0.1 that acknowledges and drops duplicate keys.

    It can be stopped and started again on the same port (a receiver that is down),
    and can answer 500 to the next ``fail_next`` requests after storing them (its
    answer lost: the sender must send again, with the same key).
    """

    def __init__(self, port: int | None = None) -> None:
        self.port = port or free_port()
        self.requests: list[tuple[dict[str, str], bytes]] = []
        self.accepted: dict[str, dict] = {}
        self.acknowledged: list[str] = []  # keys answered 2xx, in order
        self.fail_next = 0
        self.server: ThreadingHTTPServer | None = None
        self.start()

    def start(self) -> None:
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802 (http.server's naming)
                body = self.rfile.read(int(self.headers["Content-Length"]))
                receiver.requests.append((dict(self.headers), body))
                key = self.headers["Regwarden-Idempotency-Key"]
                receiver.accepted.setdefault(key, json.loads(body))
                if receiver.fail_next > 0:
                    receiver.fail_next -= 1
                    self.send_response(500)
                else:
                    receiver.acknowledged.append(key)
                    self.send_response(200)
                self.end_headers()

            def log_message(self, *args: object) -> None:
                return

        self.server = ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def stop(self) -> None:
        if self.server is not None:
            self.server.shutdown()
            self.server.server_close()
            self.server = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}/regwarden"

    def keys_seen(self) -> list[str]:
        return [headers["Regwarden-Idempotency-Key"] for headers, _ in self.requests]


def signature(body: bytes, secret: str) -> str:
    """HMAC-SHA256 of the body, as the receiver would check it (Python's hmac module)."""
    return "sha256=" + hmac.new(secret.encode(), body, hashlib.sha256).hexdigest()


class MailReceiver:
    """An SMTP server on 127.0.0.1 (aiosmtpd) that can be stopped and started again."""

    def __init__(self) -> None:
        self.port = free_port()
        self.envelopes: list = []
        self.controller = None
        self.start()

    def start(self) -> None:
        from aiosmtpd.controller import Controller

        receiver = self

        class Collect:
            async def handle_DATA(self, server, session, envelope):  # noqa: N802 (aiosmtpd API)
                receiver.envelopes.append(envelope)
                return "250 Message accepted for delivery"

        self.controller = Controller(Collect(), hostname="127.0.0.1", port=self.port)
        self.controller.start()

    def stop(self) -> None:
        if self.controller is not None:
            self.controller.stop()
            self.controller = None
