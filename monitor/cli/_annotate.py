"""``regwarden annotate``: attach a note to a date range (optionally silencing alerts in it)."""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import EXIT_OK, ConfigurationError
from ._common import open_spec_and_store, parse_instant
from ._output import add_format_option, emit_json, emit_text


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "annotate", help="note a known event over a date range",
        description="Attach a note to the half-open range [--from, --to) of a monitor; reports "
        "show it, and with --silence alerts raised in that range are not delivered.")
    parser.add_argument("config", help="the monitor spec (TOML)")
    parser.add_argument("--monitor", required=True)
    parser.add_argument("--from", dest="start", required=True, help="start (ISO date/time)")
    parser.add_argument("--to", dest="end", required=True, help="end, excluded (ISO)")
    parser.add_argument("--note", required=True)
    parser.add_argument("--segment", default=None)
    parser.add_argument("--silence", action="store_true",
                        help="silence alerts whose run falls in the range")
    add_format_option(parser)
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from ..runs.run import run_as_user

    spec, store = open_spec_and_store(options.config)
    monitor = spec.monitor(options.monitor)
    start = parse_instant(options.start, "--from")
    end = parse_instant(options.end, "--to")
    if end <= start:
        raise ConfigurationError("--to must come after --from", where="--to",
                                 hint="the range is half-open [from, to)")
    annotation_id = store.add_annotation(monitor.name, start, end, options.note,
                                         by=run_as_user(), silences_alerts=options.silence,
                                         segment=options.segment)
    store.close()
    result = {"annotation_id": annotation_id, "monitor": monitor.name,
              "from": start.isoformat(), "to": end.isoformat(), "silences_alerts": options.silence}
    if options.format == "json":
        emit_json(result)
    else:
        emit_text(f"{monitor.name}: note {annotation_id} added for {start.date()} .. {end.date()}"
                  + (" (alerts silenced)" if options.silence else ""))
    return EXIT_OK
