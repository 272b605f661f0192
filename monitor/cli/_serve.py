"""``regwarden serve CONFIG``: run every scheduled monitor until SIGTERM or Ctrl-C.

Exit codes: 0 stopped cleanly (the run under way finished); 130 stopped with a
run abandoned after ``--drain-seconds`` (nothing of it is written; the slot runs
again after its lease); 2 bad configuration (nothing starts); 3 the history
store cannot be used.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
from typing import Any

from ..errors import EXIT_OK
from ._output import note

#: exit code when a run had to be abandoned at shutdown (as after an interrupt)
EXIT_ABANDONED = 130


class _NoteHandler(logging.Handler):
    """Log records as lines on standard error, through the output module."""

    def emit(self, record: logging.LogRecord) -> None:
        try:
            note(self.format(record))
        except Exception:  # noqa: BLE001 - logging must never stop the service
            self.handleError(record)


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "serve", help="run every scheduled monitor on its schedule until stopped",
        description="Schedule every monitor that has a [schedule]: run each slot once (two "
        "serve processes may share one history store), catch up after downtime by each "
        "monitor's when_missed policy, alert on missed runs, and on SIGTERM or Ctrl-C let "
        "the run under way finish.")
    parser.add_argument("config", help="the monitor spec (TOML)")
    parser.add_argument("--drain-seconds", type=float, default=600.0, metavar="SECONDS",
                        help="how long a run under way may go on after SIGTERM / Ctrl-C "
                        "(default 600)")
    parser.add_argument("--watchdog-minutes", type=float, default=5.0, metavar="MINUTES",
                        help="how often to compare the ledger with the schedules (default 5)")
    parser.add_argument("--log-level", default="INFO",
                        choices=("DEBUG", "INFO", "WARNING", "ERROR"),
                        help="detail of the log on standard error (default INFO)")
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from ..runs.service import Service

    handler = _NoteHandler()
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger()
    root.addHandler(handler)
    root.setLevel(options.log_level)
    logging.getLogger("apscheduler").setLevel(max(logging.WARNING,
                                                  logging.getLevelName(options.log_level)))
    service = Service(options.config, drain_seconds=options.drain_seconds,
                      watchdog_minutes=options.watchdog_minutes)
    try:
        clean = service.serve()
    finally:
        service.close()
        root.removeHandler(handler)
    if not clean:
        # a worker thread is still inside a run: leave without waiting for it
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(EXIT_ABANDONED)
    return EXIT_OK
