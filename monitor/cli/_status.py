"""``regwarden status CONFIG``: per monitor, the last run, the next slot, the lag and open alerts.

Exit codes: 0 every scheduled monitor is up to date; 1 a monitor is behind its
schedule by more than its grace (or, with ``--fail-on LEVEL``, an open alert of
that severity or worse exists), so a server's health check can call it; 2 bad
configuration; 3 the history store cannot be read.
"""

from __future__ import annotations

import argparse
import datetime as dt
from typing import Any

from ..errors import EXIT_ALERTS, EXIT_OK
from ._common import parse_instant
from ._output import add_format_option, emit_json, emit_text, render_table
from ._run import add_fail_on_option, alerts_at_least, open_alerts


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "status", help="show each monitor's last run, next slot, lag and open alerts",
        description="Read the run ledger and compare it with each monitor's schedule. Exit 1 "
        "when a monitor is behind by more than its grace (for health checks), 0 otherwise.")
    parser.add_argument("config", help="the monitor spec (TOML)")
    parser.add_argument("--monitor", action="append", metavar="NAME",
                        help="only this monitor (repeat for more); default: all")
    parser.add_argument("--at", metavar="INSTANT", default=None,
                        help="judge as of this ISO instant instead of now (to look back)")
    add_fail_on_option(parser)
    add_format_option(parser)
    parser.set_defaults(handler=run)


def _ago(seconds: float) -> str:
    if seconds <= 0:
        return "on time"
    minutes = int(seconds // 60)
    days, rest = divmod(minutes, 1440)
    hours, minutes = divmod(rest, 60)
    parts = ([f"{days}d"] if days else []) + ([f"{hours}h"] if hours or days else []) + \
        [f"{minutes}m"]
    return " ".join(parts)


def _when(value: Any) -> str:
    return value.isoformat(timespec="minutes") if isinstance(value, dt.datetime) else "—"


def run(options: argparse.Namespace) -> int:
    from ..runs._build import open_store
    from ..runs.ledger import status_of
    from ..runs.spec import load_spec

    spec = load_spec(options.config)
    names = list(options.monitor or spec.monitors)
    monitors = [spec.monitor(name) for name in names]
    now = parse_instant(options.at, "--at") if options.at else dt.datetime.now(dt.UTC)
    store = open_store(spec)
    try:
        statuses = [status_of(monitor, store, now=now) for monitor in monitors]
        alerts = open_alerts(store, names)
    finally:
        store.close()
    behind = [s.monitor for s in statuses if s.is_behind]
    failing_alerts = alerts_at_least(alerts, options.fail_on)
    code = EXIT_ALERTS if behind or failing_alerts else EXIT_OK
    if options.format == "json":
        emit_json({"at": now.isoformat(), "monitors": [s.to_dict() for s in statuses],
                   "behind": behind, "open_alerts": alerts, "exit_code": code})
        return code
    rows = []
    for s in statuses:
        last = s.last_run
        last_text = f"{_when(last['slot_at'])} {last['status']}" if last else "never"
        if last and last["status"] == "failed" and last.get("error_step"):
            last_text += f" in {last['error_step']}"
        alerts_text = ", ".join(f"{n} {k}" for k, n in sorted(s.open_alerts.items())) or "none"
        rows.append([s.monitor, s.state, last_text, _when(s.next_slot),
                     _ago(s.behind_seconds) if s.schedule else "—", alerts_text])
    emit_text(f"status at {_when(now)} (UTC)")
    emit_text(render_table(["monitor", "state", "last run (slot UTC)", "next slot (UTC)",
                            "behind by", "open alerts"], rows))
    for s in statuses:
        if s.running:
            emit_text(f"  {s.monitor}: slot {_when(s.running['slot_at'])} is being run by "
                      f"{s.running['owner']} (attempt {s.running['attempt']})")
        if s.is_behind and s.oldest_pending is not None:
            emit_text(f"  {s.monitor}: the slot of {_when(s.oldest_pending)} has no completed "
                      f"run yet; see `regwarden run --due` or the serve log")
    return code
