"""``regwarden changes CONFIG --monitor NAME [--since DATE]``: what changed, and since when."""

from __future__ import annotations

import argparse
from typing import Any

from monitor.cli._history import add_monitor_arguments, instant, open_monitor
from monitor.cli._output import add_format_option, emit_json, emit_text, fmt, render_table
from monitor.errors import EXIT_OK


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "changes", help="what changed, and since when: first alert nights, checks and "
        "coefficients that moved most, the estimated change date",
        description="Compare the last night before --since (default: the first night on "
        "record) with the latest night. Coefficient moves are in the earlier night's standard "
        "errors; nightly windows overlap, so read them as a yardstick, not a test.")
    add_monitor_arguments(parser)
    parser.add_argument("--since", metavar="DATE",
                        help="look at changes from this night on (ISO date; UTC when no zone)")
    parser.add_argument("--top", type=int, default=5,
                        help="how many checks and coefficients to list (default 5)")
    add_format_option(parser)
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from monitor.report import what_changed

    since = instant(options.since, "--since")
    _spec, monitor, store = open_monitor(options)
    try:
        changes = what_changed(store, monitor.name, since=since, segment=options.segment,
                               top=max(1, options.top))
    finally:
        store.close()
    if options.format == "json":
        emit_json(changes.to_dict())
        return EXIT_OK
    emit_text(f"What changed in {monitor.name}: night of {_day(changes.reference_night)} "
              f"against night of {_day(changes.latest_night)}")
    emit_text("\nFirst night each alert condition was seen")
    emit_text(render_table(
        ["first night", "kind", "segment", "model", "severity", "now", "seen earlier"],
        [[_day(a.first_night), a.kind, a.segment or "(all)", a.model, a.severity, a.state_now,
          "yes" if a.seen_before_range else "no"] for a in changes.alerts])
        if changes.alerts else "  no alert in this range")
    emit_text("\nNights the best candidate changed")
    emit_text(render_table(
        ["night", "segment", "best before", "best now", "chosen"],
        [[_day(c.night), c.segment or "(all)", c.best_before or "—", c.best_now or "—",
          c.chosen or "—"] for c in changes.best_changes])
        if changes.best_changes else "  the best candidate did not change")
    emit_text("\nChecks that moved most")
    emit_text(render_table(
        ["check", "model", "segment", "verdict", "p before", "p now", "shift -log10 p"],
        [[m.check, m.model, m.segment or "(all)", f"{m.verdict_before} → {m.verdict_now}",
          fmt(m.p_before, 3), fmt(m.p_now, 3), fmt(m.log10_p_shift, 3)]
         for m in changes.checks])
        if changes.checks else "  no check moved")
    emit_text("\nCoefficients that moved most (in the earlier night's standard errors)")
    emit_text(render_table(
        ["term", "model", "segment", "before", "now", "moved (SE)"],
        [[m.term, m.model, m.segment or "(all)", fmt(m.estimate_before), fmt(m.estimate_now),
          fmt(m.shift_in_std_errors, 3)] for m in changes.coefficients])
        if changes.coefficients else "  no coefficient to compare")
    emit_text("\nEstimated change date")
    emit_text(render_table(
        ["model", "segment", "change at", "row", "statistic", "p", "verdict"],
        [[e.model, e.segment or "(all)", e.change_at or "—",
          e.change_index if e.change_index is not None else "—", fmt(e.statistic, 4),
          fmt(e.p_value, 3), e.verdict] for e in changes.change_estimates])
        if changes.change_estimates else "  no change date was estimated on the latest night")
    emit_text("\nAn alert is statistical evidence, not proof: people who know the data decide "
              "what to do.")
    return EXIT_OK


def _day(value: Any) -> str:
    return value.strftime("%Y-%m-%d") if value is not None else "—"
