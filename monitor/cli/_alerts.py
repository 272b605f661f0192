"""``regwarden alerts CONFIG``: list the alerts, acknowledge one, or snooze one until an instant.

Listing is the default (active alerts: open, acknowledged or snoozed; ``--state``
picks others).  ``--ack ID`` and ``--snooze ID --until INSTANT`` act on one
alert by its ``alert_id`` (the first column of the list) and record who (the OS
user) and when in the alert's history.  An acknowledged alert stays so until its
condition clears; a snoozed one is silent until the instant, and is announced
again then if its condition still holds.
"""

from __future__ import annotations

import argparse
import datetime as dt
from typing import Any

from ..errors import EXIT_OK, ConfigurationError
from ._common import open_spec_and_store, parse_instant
from ._output import add_format_option, emit_json, emit_text, render_table

_STATES = ("active", "open", "acknowledged", "snoozed", "resolved", "all")
_ACTIVE = ("open", "acknowledged", "snoozed")


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "alerts", help="list alerts; acknowledge or snooze one",
        description="List the alerts of the spec's monitors (default: the active ones), or act "
        "on one: --ack ID acknowledges it, --snooze ID --until INSTANT silences it until then. "
        "Who acted (the OS user) and when is kept in the alert's history. An alert is "
        "statistical evidence, not proof; people who know the data decide what to do.")
    parser.add_argument("config", help="the monitor spec (TOML)")
    parser.add_argument("--monitor", action="append", metavar="NAME",
                        help="only this monitor (repeat for more); default: all")
    parser.add_argument("--state", choices=_STATES, default="active",
                        help="which alerts to list: active (open, acknowledged or snoozed; "
                        "the default), one state, or all")
    action = parser.add_mutually_exclusive_group()
    action.add_argument("--ack", type=int, metavar="ID", help="acknowledge alert ID")
    action.add_argument("--snooze", type=int, metavar="ID",
                        help="snooze alert ID until --until")
    parser.add_argument("--until", metavar="INSTANT",
                        help="end of the snooze: an ISO date (its midnight UTC) or date-time")
    parser.add_argument("--note", default=None, help="a note kept with the acknowledgement or "
                        "snooze")
    add_format_option(parser)
    parser.set_defaults(handler=run)


def _plain(value: Any) -> Any:
    if value is None:
        return None
    if hasattr(value, "isoformat"):
        try:
            return None if value != value else value.isoformat()  # NaT compares unequal
        except (TypeError, ValueError):
            return None
    if isinstance(value, float) and value != value:
        return None
    return value


def _rows(store: Any, monitors: list[str], state: str) -> list[dict[str, Any]]:
    wanted = None if state == "all" else _ACTIVE if state == "active" else state
    found = []
    for name in monitors:
        frame = store.alerts(name, state=wanted)
        for row in frame.to_dict("records"):
            found.append({
                "alert_id": int(row["alert_id"]), "monitor": row["monitor"],
                "segment": row["segment"], "model": row["model"], "kind": row["kind"],
                "severity": row["severity"], "state": row["state"],
                "opened_at": _plain(row["opened_at"]), "updated_at": _plain(row["updated_at"]),
                "snooze_until": _plain(row["snooze_until"]),
                "changed_by": _plain(row["state_changed_by"]), "message": row["message"],
                "evidence": row["evidence"]})
    return found


def run(options: argparse.Namespace) -> int:
    from ..runs.run import run_as_user

    if options.until and options.snooze is None:
        raise ConfigurationError("--until is only used with --snooze", where="--until",
                                 hint="add --snooze ID, or drop --until")
    spec, store = open_spec_and_store(options.config)
    try:
        names = list(options.monitor or spec.monitors)
        for name in names:
            spec.monitor(name)
        if options.ack is None and options.snooze is None:
            rows = _rows(store, names, options.state)
            if options.format == "json":
                emit_json({"alerts": rows})
            elif not rows:
                emit_text(f"no {options.state} alerts")
            else:
                emit_text(render_table(
                    ["id", "monitor", "segment", "model", "kind", "severity", "state", "message"],
                    [[r["alert_id"], r["monitor"], r["segment"] or "—", r["model"] or "—",
                      r["kind"], r["severity"],
                      r["state"] + (f" until {r['snooze_until']}" if r["state"] == "snoozed"
                                    else ""), r["message"]] for r in rows],
                    numeric=[True] + [False] * 7))
            return EXIT_OK
        alert_id = options.ack if options.ack is not None else options.snooze
        current = next((r for r in _rows(store, names, "all") if r["alert_id"] == alert_id),
                       None)
        if current is None:
            raise ConfigurationError(f"no alert with id {alert_id} in the monitors "
                                     f"{', '.join(names)}", where="--ack" if options.ack
                                     is not None else "--snooze",
                                     hint="list them with `regwarden alerts CONFIG --state all`")
        if current["state"] not in _ACTIVE:
            raise ConfigurationError(f"alert {alert_id} is {current['state']}, not active",
                                     where="--ack" if options.ack is not None else "--snooze",
                                     hint="only open, acknowledged or snoozed alerts can be "
                                     "acknowledged or snoozed")
        user = run_as_user()
        now = dt.datetime.now(dt.UTC)
        if options.ack is not None:
            store.set_alert_state(alert_id, "acknowledged", actor=user, note=options.note,
                                  now=now)
            done = f"alert {alert_id} acknowledged by {user}"
            until = None
        else:
            if not options.until:
                raise ConfigurationError("--snooze needs --until INSTANT", where="--until",
                                         hint="e.g. --until 2025-03-10 or 2025-03-10T08:00+01:00")
            until = parse_instant(options.until, "--until")
            if until <= now:
                raise ConfigurationError(f"--until {until.isoformat()} is not in the future",
                                         where="--until", hint="give a later instant")
            store.set_alert_state(alert_id, "snoozed", actor=user, snooze_until=until,
                                  note=options.note, now=now)
            done = f"alert {alert_id} snoozed by {user} until {until.isoformat()}"
    finally:
        store.close()
    if options.format == "json":
        emit_json({"alert_id": alert_id, "state": "acknowledged" if options.ack is not None
                   else "snoozed", "by": user,
                   "snooze_until": until.isoformat() if until else None})
    else:
        emit_text(done)
    return EXIT_OK
