"""``regwarden history CONFIG --monitor NAME``: read a monitor's history on a terminal.

Views (``--view``): ``verdicts`` (default: which candidate led each night and by
how much), ``metrics`` (one metric per candidate; ``--metric``, default the
family's criterion), ``checks``, ``coefficients``, ``notes`` (promotions and
annotations), ``alerts`` and ``nights`` (every run, failed ones with their
reason).  ``--format table|csv|json``; ``--plot FILE.png|.svg`` also draws the
view (verdicts, metrics, coefficients and checks have a figure).
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
from pathlib import Path
from typing import Any

from monitor.cli._common import parse_instant
from monitor.cli._output import emit_json, emit_text, note, render_table
from monitor.errors import EXIT_OK, ConfigurationError

VIEWS = ("verdicts", "metrics", "checks", "coefficients", "notes", "alerts", "nights")


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "history", help="show a monitor's history: verdicts, metrics, checks, coefficients, "
        "notes, alerts, nights",
        description="Read what the nightly runs of one monitor stored. Times are the nights' "
        "scheduled instants (UTC); --from/--until are half-open: from <= night < until.")
    add_monitor_arguments(parser)
    parser.add_argument("--view", choices=VIEWS, default="verdicts",
                        help="what to show (default: verdicts)")
    parser.add_argument("--metric", help="metric for --view metrics (default: the family's "
                        "criterion), e.g. r_squared, adj_r_squared, sigma, bic, weight")
    parser.add_argument("--model", help="only this candidate model")
    parser.add_argument("--check", help="only this check id (for --view checks)")
    parser.add_argument("--term", help="only this coefficient (for --view coefficients)")
    parser.add_argument("--state", help="only alerts in this state (open, acknowledged, "
                        "snoozed, resolved)")
    parser.add_argument("--from", dest="start", metavar="DATE",
                        help="first night to show (ISO date or date-time; UTC when no zone)")
    parser.add_argument("--until", dest="end", metavar="DATE",
                        help="show nights before this instant")
    parser.add_argument("--format", choices=("table", "csv", "json"), default="table",
                        help="table (for people), csv or json (for programs)")
    parser.add_argument("--plot", metavar="FILE", help="also draw the view to FILE (.png or "
                        ".svg)")
    parser.set_defaults(handler=run)


def add_monitor_arguments(parser: argparse.ArgumentParser) -> None:
    """CONFIG, --monitor and --segment: shared by history, report and changes."""
    parser.add_argument("config", help="the monitor spec (TOML)")
    parser.add_argument("--monitor", required=True, help="the monitor's name in the spec")
    parser.add_argument("--segment", help="only this segment (monitors with a segment column)")


def instant(text: str | None, option: str) -> dt.datetime | None:
    """An optional ISO date or date-time option as an aware UTC instant."""
    return None if text is None else parse_instant(text, option)


def open_monitor(options: argparse.Namespace) -> tuple[Any, Any, Any]:
    """(spec, the monitor's spec, its history store) for a command's options."""
    from monitor.runs._build import open_store
    from monitor.runs.spec import load_spec

    spec = load_spec(options.config)
    monitor = spec.monitor(options.monitor)
    return spec, monitor, open_store(spec)


def run(options: argparse.Namespace) -> int:
    from monitor.report import _views

    start, end = instant(options.start, "--from"), instant(options.end, "--until")
    if start is not None and end is not None and end <= start:
        raise ConfigurationError(f"--until {options.end} is not after --from {options.start}",
                                 where="--until", hint="give a later --until")
    _spec, monitor, store = open_monitor(options)
    try:
        name, segment, model = monitor.name, options.segment, options.model
        metric = options.metric or monitor.family.criterion
        if options.view == "verdicts":
            view = _views.verdict_timeline(store, name, segment=segment, start=start, end=end)
        elif options.view == "metrics":
            view = _views.metric_trend(store, name, metric, model=model, segment=segment,
                                       start=start, end=end)
        elif options.view == "checks":
            view = _views.check_outcomes(store, name, check=options.check, model=model,
                                         segment=segment, start=start, end=end)
        elif options.view == "coefficients":
            view = _views.coefficient_paths(store, name, model=model, term=options.term,
                                            segment=segment, start=start, end=end)
        elif options.view == "notes":
            view = _views.notes(store, name, start=start, end=end)
        elif options.view == "alerts":
            view = _views.alerts_view(store, name, state=options.state, model=model,
                                      segment=segment, start=start, end=end)
        else:
            view = _views.nights(store, name, start=start, end=end)
        if options.plot:
            _plot(options, store, monitor, metric, start, end)
    finally:
        store.close()
    _emit(view, options.format)
    return EXIT_OK


def _emit(view: Any, form: str) -> None:
    from monitor.report._views import view_to_csv, view_to_json

    if form == "json":
        emit_json(view_to_json(view))
    elif form == "csv":
        emit_text(view_to_csv(view))
    else:
        emit_text(view.title)
        emit_text(render_table(view.columns, [[_cell(v) for v in row] for row in view.rows],
                               numeric=[_numeric(view, i) for i in range(len(view.columns))])
                  if view.rows else "  (nothing recorded)")
        for line in view.notes:
            emit_text(line)


def _cell(value: Any) -> Any:
    if isinstance(value, dt.datetime):
        moment = value.astimezone(dt.UTC)
        return moment.strftime("%Y-%m-%d") if moment.time() == dt.time(0) else \
            moment.strftime("%Y-%m-%d %H:%M")
    if isinstance(value, (dict, list)):
        text = json.dumps(value, ensure_ascii=False, default=str)
        return text if len(text) <= 60 else text[:59] + "…"
    return "—" if value is None else value


def _numeric(view: Any, index: int) -> bool:
    values = [row[index] for row in view.rows if row[index] is not None]
    return bool(values) and all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                for v in values)


def _plot(options: argparse.Namespace, store: Any, monitor: Any, metric: str,
          start: dt.datetime | None, end: dt.datetime | None) -> None:
    from monitor.report import _figures

    path = Path(options.plot)
    if path.suffix.lower() not in (".png", ".svg"):
        raise ConfigurationError(f"--plot {options.plot!r} must end in .png or .svg",
                                 where="--plot", hint="for example --plot trend.svg")
    figure = _figures.view_figure(store, monitor.name, options.view, metric=metric,
                                  criterion=monitor.family.criterion,
                                  margin=monitor.family.margin, model=options.model,
                                  segment=options.segment or "", start=start, end=end)
    if figure is None:
        raise ConfigurationError(f"--view {options.view} has no figure", where="--plot",
                                 hint="draw verdicts, metrics, coefficients or checks")
    path.parent.mkdir(parents=True, exist_ok=True)
    figure.savefig(path, format=path.suffix[1:].lower(), dpi=150)
    note(f"figure written to {path}")
