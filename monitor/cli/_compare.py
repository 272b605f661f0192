"""``regwarden compare DATA --family FAMILY.toml``: rank a family of candidates on a data file."""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import EXIT_OK
from ..stats.family import CRITERIA, FamilyReport
from ._output import add_format_option, emit_json, emit_text, fmt, render_table

_CAVEAT = ("This is statistical evidence, not proof: people who know the domain decide what "
           "to do with it.")


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "compare", help="refit a family of candidate models and say whether the chosen one "
        "is still the best",
        description="Refit every candidate of a family from one read of a CSV or Parquet "
        "file, rank them by an information criterion, test nested pairs (partial F and "
        "likelihood ratio) and give a verdict on the chosen model.")
    parser.add_argument("data", help="CSV or Parquet file (or a folder of Parquet files)")
    parser.add_argument("--family", required=True, metavar="FAMILY.toml",
                        help="family file: response, chosen, criterion, optional alpha and "
                        "margin, and a [candidates] table of name = \"formula\" lines")
    parser.add_argument("--strict", action="store_true",
                        help="refuse rows with missing or non-finite values instead of leaving "
                        "them out for every candidate")
    add_format_option(parser)
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from ..family import Family

    family = Family.from_toml(options.family)
    report = family.evaluate(options.data, strict=options.strict)
    if options.format == "json":
        data = report.to_dict()
        for fit in data["fits"].values():
            fit.pop("covariance", None)
        emit_json(data)
    else:
        emit_text(format_report(report))
    return EXIT_OK


def format_report(report: FamilyReport) -> str:
    """Our own plain layout: the family, its rows, the ranking, nested tests, the verdict."""
    spec = report.family
    label = CRITERIA[spec.criterion]
    verdict = report.verdict
    lines = [f"family     {len(spec.candidates)} candidates for {spec.response}, chosen "
             f"{spec.chosen!r}, ranked by {label} (margin {spec.margin:g}, F-tests at "
             f"{spec.alpha:g})"]
    rows = report.rows
    if rows is not None:
        lines.append(f"rows       {rows.rows_used:,} used by every candidate, "
                     f"{rows.dropped_rows:,} left out (common rows: a row unusable for one "
                     "candidate is left out for all)")
        for column, count in rows.dropped_by_column.items():
            lines.append(f"           {column}: {count:,} rows with missing, non-finite or "
                         "unseen values")
    lines.append("")
    lines.append(f"ranking, best first (Δ = {label} minus the best; weight = Akaike-type weight "
                 f"from Δ; odds = best's weight / this one's)")
    table_rows = []
    for row in report.ranking:
        mark = "*" if row.is_chosen else ""
        table_rows.append([
            f"{row.position}{mark}", row.name, row.n_params, row.log_likelihood, row.aic,
            row.bic, row.aicc, row.delta, row.weight, row.evidence_ratio, row.r_squared,
            row.adj_r_squared, row.ss_resid, row.f_pvalue,
            row.rank_deficiency if row.rank_deficiency else ""])
    lines.append(render_table(
        ["#", "candidate", "params", "log-lik", "AIC", "BIC", "AICc", f"Δ{label}", "weight",
         "odds", "R²", "adj. R²", "residual SS", "F p-value", "aliased"],
        table_rows,
        numeric=[False, False] + [True] * 13))
    lines.append("  (* the chosen model; 'params' counts mean coefficients, intercept included)")
    for row in report.ranking:
        if row.aliased_terms:
            lines.append(f"  {row.name}: aliased, not estimable: {', '.join(row.aliased_terms)}")
    lines.append("")
    if report.nested:
        lines.append("nested pairs around the chosen model (does the larger one's extra part "
                     "matter?)")
        lines.append(render_table(
            ["smaller", "larger", "restrictions", "F", "p (F)", "LR", "p (χ², LR)",
             f"at {spec.alpha:g}", "why shown"],
            [[t.smaller, t.larger, t.df, t.f_statistic, t.f_pvalue, t.lr_statistic,
              t.lr_pvalue, "—" if t.rejects is None else
              ("extra part matters" if t.rejects else "no evidence it matters"),
              ", ".join(role.replace("_", " ") for role in t.roles)]
             for t in report.nested],
            numeric=[False, False, True, True, True, True, True, False, False]))
    else:
        lines.append("nested pairs: no candidate nests or is nested in the chosen model; only "
                     "the criterion compares them")
    lines.append("")
    lines.append("verdict")
    facts = [
        ["best by " + label, verdict.best],
        ["chosen is the best", fmt(verdict.chosen_is_best)],
        [f"Δ{label} of the chosen model", fmt(verdict.delta)],
        [f"within the margin of {spec.margin:g}", fmt(verdict.chosen_within_margin)],
        ["weight of the chosen model", fmt(verdict.chosen_weight)],
        ["support (Burnham & Anderson, from memory)", verdict.support_wording],
        [f"chosen model's overall F-test p ({'rejects' if verdict.chosen_is_useful else 'no'}"
         " 'all slopes zero')" if verdict.chosen_is_useful is not None
         else "chosen model's overall F-test", fmt(verdict.chosen_f_pvalue)],
    ]
    if verdict.nested_direction is not None:
        direction = verdict.nested_direction.replace("_", " ")
        facts.append([f"partial F-test, best vs chosen ({direction})",
                      fmt(verdict.nested_f_pvalue)])
    lines.append(render_table(["", ""], facts, numeric=[False, False]).split("\n", 2)[2])
    lines.append("")
    lines.append("  " + verdict.summary)
    lines.append("  " + _CAVEAT)
    return "\n".join(lines)
