"""``regwarden store upgrade|prune``: schema upgrades and explicit pruning of old history."""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import EXIT_OK
from ._common import parse_instant
from ._output import add_format_option, emit_json, emit_text, render_table


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser("store", help="upgrade the history store or prune old runs")
    actions = parser.add_subparsers(dest="action", metavar="ACTION")
    actions.required = True
    upgrade = actions.add_parser("upgrade", help="create or upgrade the history tables")
    upgrade.add_argument("config", help="the monitor spec (TOML)")
    add_format_option(upgrade)
    upgrade.set_defaults(handler=run_upgrade)
    prune = actions.add_parser(
        "prune", help="delete a monitor's runs before a date (explicit; nothing else deletes)",
        description="Delete the runs of one monitor whose slot is before --before, with their "
        "results. Alerts, baselines, promotions, annotations and the file ledger are kept. "
        "Without --yes nothing is deleted: the counts are shown.")
    prune.add_argument("config", help="the monitor spec (TOML)")
    prune.add_argument("--monitor", required=True)
    prune.add_argument("--before", required=True, help="ISO date; runs before it go")
    prune.add_argument("--yes", action="store_true", help="really delete")
    add_format_option(prune)
    prune.set_defaults(handler=run_prune)


def run_upgrade(options: argparse.Namespace) -> int:
    from storage.history import HistoryStore

    from ..runs.spec import load_spec

    spec = load_spec(options.config)
    store = HistoryStore(spec.store_url, url_env=spec.store_env, table_prefix=spec.table_prefix)
    applied = store.upgrade()
    version = store.schema_version()
    store.close()
    if options.format == "json":
        emit_json({"applied": applied, "schema_version": version})
    else:
        emit_text(f"history store at schema version {version}"
                  + (f" (applied {', '.join(map(str, applied))})" if applied else
                     " (already current)"))
    return EXIT_OK


def run_prune(options: argparse.Namespace) -> int:
    from ._common import open_spec_and_store

    spec, store = open_spec_and_store(options.config)
    monitor = spec.monitor(options.monitor)
    before = parse_instant(options.before, "--before")
    counts = store.prune(monitor.name, before, dry_run=not options.yes)
    store.close()
    if options.format == "json":
        emit_json({"monitor": monitor.name, "before": before.isoformat(),
                   "deleted": options.yes, "rows": counts})
    else:
        verb = "deleted" if options.yes else "would delete (rerun with --yes)"
        emit_text(f"{monitor.name}: {verb} before {before.date()}")
        emit_text(render_table(["table", "rows"], [[k, v] for k, v in counts.items()]))
    return EXIT_OK
