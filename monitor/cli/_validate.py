"""``regwarden validate CONFIG``: check a spec, its sources and its store before anything runs."""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import EXIT_OK, ConfigurationError, RegwardenError
from ._output import add_format_option, emit_json, emit_text, render_table


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "validate", help="check a monitor spec and reach its sources and history store",
        description="Parse and validate the spec (every key, formula, cron line), then open "
        "each source (schema check, no data read) and the history store. Exit 2 on any problem.")
    parser.add_argument("config", help="the monitor spec (TOML)")
    parser.add_argument("--offline", action="store_true",
                        help="only check the file; do not open sources or the store")
    add_format_option(parser)
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from ..runs._build import open_source, open_store
    from ..runs.spec import load_spec

    spec = load_spec(options.config)
    rows: list[dict[str, Any]] = []
    if not options.offline:
        try:
            store = open_store(spec)
            rows.append({"part": "history store", "name": store.describe(), "status": "ok",
                         "detail": f"schema version {store.schema_version()}"})
            store.close()
        except RegwardenError as error:
            raise ConfigurationError(f"the history store cannot be used: {error.what}",
                                     where="history", hint=error.hint or "check history.store"
                                     ) from error
        for name, monitor in spec.monitors.items():
            try:
                summary = open_source(monitor).check()
            except RegwardenError as error:
                raise ConfigurationError(f"the source of monitor {name!r} cannot be read: "
                                         f"{error.what}", where=f"monitors.{name}.source",
                                         hint=error.hint or "check the source keys") from error
            needed = {monitor.source.time_column, *(c for f in monitor.family.candidates.values()
                                                    for c in _columns(f))}
            if monitor.segment_column:
                needed.add(monitor.segment_column)
            missing = sorted(c for c in needed if c not in summary.columns)
            if missing:
                raise ConfigurationError(
                    f"monitor {name!r} needs column {missing[0]!r}, which its source lacks",
                    where=f"monitors.{name}", hint="the source has: "
                    + ", ".join(sorted(summary.columns)))
            rows.append({"part": f"source of {name}", "name": summary.source, "status": "ok",
                         "detail": f"{summary.rows} rows up to {summary.max_time}"})
    result = {"config": str(spec.path), "digest": spec.digest, "monitors": sorted(spec.monitors),
              "checked": rows}
    if options.format == "json":
        emit_json(result)
    else:
        emit_text(f"spec {spec.path} is valid ({len(spec.monitors)} monitor(s), digest "
                  f"{spec.digest[:12]})")
        if rows:
            emit_text(render_table(["part", "status", "detail"],
                                   [[r["part"], r["status"], r["detail"]] for r in rows]))
    return EXIT_OK


def _columns(formula: str) -> tuple[str, ...]:
    from ..stats.formula import parse_formula

    return parse_formula(formula).columns
