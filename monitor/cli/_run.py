"""``regwarden run CONFIG``: run monitors once, now, for a date, or for the slots that are due.

Exit codes (the shared conventions): 0 every run completed or was recorded
before; the worst failure's code when a run failed (3 data or source, 2
configuration, 4 internal); otherwise 1 when ``--fail-on LEVEL`` is given and an
alert of that severity or worse is open for a monitor that was run.
"""

from __future__ import annotations

import argparse
from collections.abc import Iterable, Sequence
from typing import Any

from ..errors import EXIT_ALERTS, EXIT_OK
from ._common import parse_instant
from ._output import add_format_option, emit_json, emit_text, render_table

SEVERITIES = ("info", "warning", "critical")


def add_fail_on_option(parser: Any) -> None:
    parser.add_argument("--fail-on", choices=SEVERITIES, default=None, metavar="LEVEL",
                        help="exit 1 when an open alert of this severity or worse "
                        "(info < warning < critical) remains for the monitors concerned; "
                        "default: alerts do not change the exit code")


def open_alerts(store: Any, monitors: Iterable[str]) -> list[dict[str, Any]]:
    """Open alerts of the monitors, as plain dicts, oldest first."""
    found: list[dict[str, Any]] = []
    for name in monitors:
        frame = store.alerts(name, state="open")
        for row in frame.to_dict("records"):
            found.append({
                "alert_id": int(row["alert_id"]), "monitor": row["monitor"],
                "segment": row["segment"], "model": row["model"], "kind": row["kind"],
                "severity": row["severity"], "message": row["message"],
                "opened_at": row["opened_at"].isoformat() if row["opened_at"] is not None
                else None})
    return found


def alerts_at_least(alerts: Sequence[dict[str, Any]], level: str | None) -> list[dict[str, Any]]:
    if level is None:
        return []
    floor = SEVERITIES.index(level)
    return [a for a in alerts
            if a["severity"] in SEVERITIES and SEVERITIES.index(a["severity"]) >= floor]


def exit_code_of(outcomes: Sequence[Any], alerts: Sequence[dict[str, Any]],
                 fail_on: str | None) -> int:
    failed = [o.exit_code for o in outcomes if o.status == "failed"]
    if failed:
        return max(failed)
    if alerts_at_least(alerts, fail_on):
        return EXIT_ALERTS
    return EXIT_OK


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "run", help="run monitors once and record the runs in the history",
        description="Run each monitor (or one) once: for now, for the night of --as-of, or "
        "for the slots its schedule says are due (--due, for jobs with their own scheduler). "
        "A slot recorded before is not run again. Exit 0 clean, 1 open alerts at or above "
        "--fail-on, 2 configuration, 3 a run failed on its data or source, 4 internal error.")
    parser.add_argument("config", help="the monitor spec (TOML)")
    parser.add_argument("--monitor", action="append", metavar="NAME",
                        help="run only this monitor (repeat for more); default: all")
    when = parser.add_mutually_exclusive_group()
    when.add_argument("--as-of", metavar="DATE",
                      help="the run's instant: a date (its midnight UTC) or an ISO date-time; "
                      "the window ends just before it. Default: now")
    when.add_argument("--due", action="store_true",
                      help="run the slots the schedules say are due now (missed-slot policy "
                      "and grace included); monitors without a schedule are left out")
    add_fail_on_option(parser)
    add_format_option(parser)
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from .._etl import run_due
    from ..runs._build import open_store
    from ..runs.run import run_monitor
    from ..runs.spec import load_spec

    spec = load_spec(options.config)
    as_of = parse_instant(options.as_of, "--as-of") if options.as_of else None
    names = list(options.monitor or spec.monitors)
    for name in names:
        spec.monitor(name)  # unknown names: exit 2 before anything runs
    store = open_store(spec)
    try:
        if options.due:
            outcomes = run_due(spec, monitors=[n for n in names
                                               if spec.monitors[n].schedule is not None],
                               store=store)
        else:
            outcomes = [run_monitor(spec, name, as_of, store=store) for name in names]
        alerts = open_alerts(store, names)
    finally:
        store.close()
    code = exit_code_of(outcomes, alerts, options.fail_on)
    if options.format == "json":
        emit_json({"runs": [dict(o.to_dict(), exit_code=o.exit_code) for o in outcomes],
                   "open_alerts": alerts, "exit_code": code})
    else:
        emit_text(format_outcomes(outcomes) if outcomes else "nothing was due")
        if alerts:
            emit_text("")
            emit_text(format_alerts(alerts))
    return code


def _verdict_text(verdicts: Any) -> str:
    parts = []
    for segment, verdict in verdicts.items():
        text = verdict.get("summary") or f"best {verdict.get('best')}"
        parts.append(f"{segment}: {text}" if segment else text)
    return "; ".join(parts)


def format_outcomes(outcomes: Sequence[Any]) -> str:
    rows = []
    for o in outcomes:
        note = o.reason if o.status != "completed" else _verdict_text(o.verdicts)
        rows.append([o.monitor, o.slot_at.isoformat(timespec="minutes"), o.status,
                     o.rows_read, note or ""])
    return render_table(["monitor", "slot (UTC)", "status", "rows", "verdict or reason"], rows,
                        numeric=[False, False, False, True, False])


def format_alerts(alerts: Sequence[dict[str, Any]]) -> str:
    return "open alerts\n" + render_table(
        ["id", "monitor", "severity", "kind", "model", "message"],
        [[a["alert_id"], a["monitor"], a["severity"], a["kind"], a["model"] or "—",
          a["message"]] for a in alerts], numeric=[True, False, False, False, False, False])
