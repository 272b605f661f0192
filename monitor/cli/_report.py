"""``regwarden report CONFIG --monitor NAME --out FILE.html``: the one-file HTML report."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from monitor.cli._history import add_monitor_arguments, open_monitor
from monitor.cli._output import note
from monitor.errors import EXIT_OK, ConfigurationError


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "report", help="write a self-contained HTML report of a monitor",
        description="Write one HTML file (inline figures, no script, loads nothing) that "
        "answers: what does this monitor watch, where do things stand, which alerts are open "
        "and on what evidence, what changed and since when.")
    add_monitor_arguments(parser)
    parser.add_argument("--out", required=True, metavar="FILE.html",
                        help="where to write the report")
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from monitor.report import write_report

    out = Path(options.out)
    if out.suffix.lower() not in (".html", ".htm"):
        raise ConfigurationError(f"--out {options.out!r} should end in .html", where="--out",
                                 hint="for example --out heat-report.html")
    if out.exists() and out.is_dir():
        raise ConfigurationError(f"--out {options.out!r} is a folder", where="--out",
                                 hint="name a file inside it, e.g. report.html")
    spec, monitor, store = open_monitor(options)
    try:
        segments = [options.segment] if options.segment is not None else None
        path = write_report(store, monitor.name, out, spec=spec, segments=segments)
    finally:
        store.close()
    note(f"report of {monitor.name!r} written to {path}")
    return EXIT_OK
