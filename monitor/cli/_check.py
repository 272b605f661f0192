"""``regwarden check DATA --formula F``: assumption checks (and drift against a baseline)."""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import EXIT_ALERTS, EXIT_OK
from ._output import add_format_option, emit_json, emit_text, fmt, render_table

_ORDER = {"pass": 0, "not_applicable": 0, "warn": 1, "fail": 2}


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "check", help="check a model's assumptions (and drift against a baseline) on a data file",
        description="Fit one model to a CSV or Parquet file and run the assumption checks: "
        "normality, constant variance, independence in time order, functional form, "
        "collinearity, influence and stability; with --baseline also the drift checks. "
        "Each verdict is statistical evidence, not proof.")
    parser.add_argument("data", help="CSV or Parquet file (or a folder of Parquet files)")
    parser.add_argument("--formula", required=True, help='for example "load ~ temp + wind"')
    parser.add_argument("--time-column", help="column the rows are ordered by (needed by the "
                        "Durbin-Watson, Breusch-Godfrey, Ljung-Box and CUSUM checks)")
    parser.add_argument("--key-column", help="column naming rows in the influence report "
                        "(default: the time column, then the row number)")
    parser.add_argument("--baseline", help="a baseline window (CSV or Parquet) to check drift "
                        "against")
    parser.add_argument("--break-date", help="a value of the time column for Chow's test")
    parser.add_argument("--sample-size", type=int, default=5000,
                        help="rows in the seeded random sample (default 5000)")
    parser.add_argument("--seed", type=int, default=20240917, help="seed of the sample")
    parser.add_argument("--lags", type=int, help="lag order of Breusch-Godfrey and Ljung-Box "
                        "(default min(10, n // 5))")
    parser.add_argument("--fail-on", choices=("warn", "fail"),
                        help="exit 1 when any check's verdict is at or above this level")
    parser.add_argument("--strict", action="store_true",
                        help="refuse rows with missing or non-finite values instead of leaving "
                        "them out")
    add_format_option(parser)
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from .._checks_api import check_data
    from ..stats.residual_pass import CheckOptions

    if options.sample_size < 0:
        from ..errors import ConfigurationError
        raise ConfigurationError(f"--sample-size must be 0 or more, got {options.sample_size}",
                                 where="--sample-size", hint="for example --sample-size 5000")
    check_options = CheckOptions(sample_size=options.sample_size, seed=options.seed,
                                 lags=options.lags)
    report = check_data(options.data, options.formula, time_column=options.time_column,
                        key_column=options.key_column, baseline=options.baseline,
                        break_date=options.break_date, strict=options.strict,
                        options=check_options)
    if options.format == "json":
        emit_json(report.to_dict())
    else:
        emit_text(format_report(report))
    if options.fail_on:
        worst = max((_ORDER[c.verdict] for c in report.checks), default=0)
        if worst >= _ORDER[options.fail_on]:
            return EXIT_ALERTS
    return EXIT_OK


def _df(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, (tuple, list)):
        return ", ".join(fmt(float(v), 4) for v in value)
    return fmt(float(value), 4)


def format_report(report: Any) -> str:
    """Our own plain layout: what was checked, then one line per check."""
    lines = [f"model  {report.formula}",
             f"rows   {report.rows:,} used, {report.dropped_rows:,} left out"]
    if report.baseline_rows is not None:
        lines.append(f"       baseline: {report.baseline_rows:,} rows")
    if report.time_column:
        lines.append(f"order  by {report.time_column}")
    lines.append("")
    rows = []
    for check in report.checks:
        if not check.applicable:
            note = f"n/a: {check.reason}"
        elif check.sample_size is not None:
            note = f"on a random sample of {check.sample_size:,} rows"
        else:
            note = ""
        rows.append([check.check, check.verdict.replace("_", " "), check.statistic,
                     _df(check.df), check.p_value, note])
    lines.append(render_table(["check", "verdict", "statistic", "df", "p-value", "note"], rows,
                              numeric=[False, False, True, True, True, False]))
    if report.change is not None:
        change = report.change
        lines.append("")
        lines.append(f"most likely change in the residual mean: after row {change.row:,} "
                     f"(key {change.key}); mean {fmt(change.mean_before)} before, "
                     f"{fmt(change.mean_after)} after")
    lines.append("")
    lines.append("A verdict is statistical evidence, not proof; people who know the data decide "
                 "what to do.")
    return "\n".join(lines)
