"""``regwarden deliver CONFIG``: send the messages still waiting in the outbox, now.

Every undelivered message of the spec's monitors is tried (the backoff times the
outbox records are for automatic retries; this command is a person or a cron job
asking for a try now).  A message a target acknowledged is never sent again.
Exit 0 when nothing is left waiting; 3 when a target still refuses (the messages
stay in the outbox for the next run or the next ``deliver``).
"""

from __future__ import annotations

import argparse
import datetime as dt
from typing import Any

from ..errors import EXIT_DATA, EXIT_OK
from ._common import open_spec_and_store
from ._output import add_format_option, emit_json, emit_text, render_table


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "deliver", help="send the alert messages still waiting in the outbox",
        description="Try every undelivered alert message of the spec's monitors now, with the "
        "retries of [monitors.NAME.delivery]. Exit 0 when none is left waiting, 3 when a target "
        "still refuses (the messages stay for the next try).")
    parser.add_argument("config", help="the monitor spec (TOML)")
    parser.add_argument("--monitor", action="append", metavar="NAME",
                        help="only this monitor (repeat for more); default: all")
    add_format_option(parser)
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from ..runs.alerting import deliver_monitor

    spec, store = open_spec_and_store(options.config)
    results = []
    try:
        names = list(options.monitor or spec.monitors)
        monitors = [spec.monitor(name) for name in names]
        for monitor in monitors:
            report = deliver_monitor(store, monitor, now=dt.datetime.now(dt.UTC))
            results.append({"monitor": monitor.name, "delivered": len(report.delivered),
                            "failed": len(report.failed),
                            "errors": sorted({error for _, error in report.failed}),
                            "unknown_target": len(report.unknown_target)})
    finally:
        store.close()
    code = EXIT_DATA if any(r["failed"] or r["unknown_target"] for r in results) else EXIT_OK
    if options.format == "json":
        emit_json({"deliveries": results, "exit_code": code})
    else:
        emit_text(render_table(
            ["monitor", "delivered", "still waiting", "why"],
            [[r["monitor"], r["delivered"], r["failed"] + r["unknown_target"],
              "; ".join(r["errors"]) or ("target no longer in the spec" if r["unknown_target"]
                                         else "")] for r in results],
            numeric=[False, True, True, False]))
    return code
