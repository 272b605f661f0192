"""``regwarden backfill CONFIG --monitor NAME --from DATE --to DATE``: replay past nights.

Exit codes: 0 every night completed or was recorded before; the worst failure's
code when a night failed (3 data or source, 4 internal); 1 with ``--fail-on
LEVEL`` when an alert of that severity or worse is open afterwards; 130 when
stopped with Ctrl-C (run the same command again to resume); 2 bad usage.
"""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import EXIT_ALERTS, EXIT_OK
from ._output import add_format_option, emit_json, emit_text, render_table
from ._run import add_fail_on_option, alerts_at_least, open_alerts

EXIT_STOPPED = 130


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "backfill", help="replay a monitor's nightly runs over past data",
        description="Run the monitor for every slot of its schedule (or every day at 00:00 UTC "
        "without one) from --from to --to, oldest first; each night reads only the rows "
        "before its slot. Nights recorded before are skipped, so the command can be stopped "
        "and started again. A progress bar shows on a terminal.")
    parser.add_argument("config", help="the monitor spec (TOML)")
    parser.add_argument("--monitor", required=True, metavar="NAME", help="the monitor")
    parser.add_argument("--from", dest="start", required=True, metavar="DATE",
                        help="first day (included), in the schedule's time zone")
    parser.add_argument("--to", dest="end", required=True, metavar="DATE",
                        help="last day (included)")
    parser.add_argument("--step", type=int, default=1, metavar="N",
                        help="run every N-th slot only (7 with a nightly schedule: weekly)")
    parser.add_argument("--progress", choices=("auto", "always", "never"), default="auto",
                        help="progress bar on standard error: auto (on a terminal), always "
                        "or never")
    add_fail_on_option(parser)
    add_format_option(parser)
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from ..runs._build import open_store
    from ..runs.backfill import backfill
    from ..runs.spec import load_spec

    spec = load_spec(options.config)
    spec.monitor(options.monitor)
    progress = {"auto": None, "always": True, "never": False}[options.progress]
    store = open_store(spec)
    try:
        report = backfill(spec, options.monitor, options.start, options.end, step=options.step,
                          store=store, progress=progress, handle_interrupt=True)
        alerts = open_alerts(store, [options.monitor])
    finally:
        store.close()
    if report.exit_code:
        code = report.exit_code
    elif report.stopped_early:
        code = EXIT_STOPPED
    elif alerts_at_least(alerts, options.fail_on):
        code = EXIT_ALERTS
    else:
        code = EXIT_OK
    if options.format == "json":
        emit_json(dict(report.to_dict(), open_alerts=alerts, exit_code=code))
        return code
    first = report.first_slot.isoformat(timespec="minutes") if report.first_slot else "—"
    last = report.last_slot.isoformat(timespec="minutes") if report.last_slot else "—"
    emit_text(f"backfill of {report.monitor}: {report.planned} slot(s) from {first} to {last} "
              f"(UTC) in {report.elapsed_seconds:.1f} s")
    emit_text(render_table(["nights", "count"], [
        ["completed now", report.completed], ["recorded before", report.already_recorded],
        ["failed", report.failed], ["held by another process", report.held_elsewhere],
        ["not reached (stopped)", report.not_reached]], numeric=[False, True]))
    if report.failures:
        emit_text("")
        emit_text(render_table(["slot (UTC)", "reason"],
                               [[slot, reason] for slot, reason in report.failures.items()]))
    if report.stopped_early:
        emit_text("stopped early: run the same command again to carry on")
    return code
