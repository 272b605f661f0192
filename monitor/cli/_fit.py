"""``regwarden fit DATA --formula F``: fit one model to a CSV or Parquet file."""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import EXIT_OK
from ..stats.results import FitResult
from ._output import add_format_option, emit_json, emit_text, render_table


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "fit", help="fit one linear model to a data file",
        description="Fit one linear model (Wilkinson–Rogers formula) to a CSV or Parquet file "
        "and report its coefficients, sums of squares, F-test, R² and information criteria.")
    parser.add_argument("data", help="CSV or Parquet file (or a folder of Parquet files)")
    parser.add_argument("--formula", required=True, help='for example "load ~ temp + wind"')
    parser.add_argument("--strict", action="store_true",
                        help="refuse rows with missing or non-finite values instead of leaving "
                        "them out")
    add_format_option(parser)
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from .._api import fit

    result = fit(options.data, options.formula, strict=options.strict)
    if options.format == "json":
        data = result.to_dict()
        data.pop("covariance", None)
        emit_json(data)
    else:
        emit_text(format_fit(result))
    return EXIT_OK


def format_fit(result: FitResult) -> str:
    """Our own plain layout: what was fitted, how well, the ANOVA split, the coefficients."""
    lines = [f"model  {result.formula}"]
    left_out = f"{result.dropped_rows:,} left out (missing, non-finite or unseen values)"
    lines.append(f"rows   {result.n:,} used, {left_out}")
    if result.unseen_levels:
        for column, levels in result.unseen_levels.items():
            shown = ", ".join(f"{k!r}×{v}" for k, v in list(levels.items())[:5])
            lines.append(f"       unseen levels of {column}: {shown}")
    if result.aliased_terms:
        lines.append(f"       aliased (not estimable, shown blank): {', '.join(result.aliased_terms)}")
    lines.append("")
    lines.append("how well it fits")
    lines.append(render_table(
        ["measure", "value"],
        [["R²", result.r_squared],
         ["adjusted R²", result.adj_r_squared],
         ["residual standard deviation", result.sigma],
         [f"F-test, all slopes zero (df {result.df_model}, {result.df_resid})",
          result.f_statistic],
         ["  p-value of the F-test", result.f_pvalue],
         ["log-likelihood", result.log_likelihood],
         ["AIC (mean coefficients)", result.aic],
         ["BIC (mean coefficients)", result.bic],
         ["AICc (Hurvich–Tsai)", result.aicc]],
        numeric=[False, True]))
    lines.append("")
    centred = "about the mean" if result.has_intercept else "about zero (no intercept)"
    lines.append(f"where the variation goes (sums of squares {centred})")
    lines.append(render_table(
        ["part", "df", "sum of squares", "mean square"],
        [["explained by the model", result.df_model, result.ss_model, result.ms_model],
         ["left in the residuals", result.df_resid, result.ss_resid, result.ms_resid],
         ["total", result.df_model + result.df_resid, result.ss_total, None]],
        numeric=[False, True, True, True]))
    lines.append("")
    level = int(round(result.confidence_level * 100))
    lines.append(f"coefficients ({level}% confidence interval)")
    lines.append(render_table(
        ["term", "estimate", "std. error", "t", "p-value", "lower", "upper"],
        [[c.term, c.estimate, c.std_error, c.t_statistic, c.p_value, c.ci_lower, c.ci_upper]
         for c in result.coefficients],
        numeric=[False, True, True, True, True, True, True]))
    return "\n".join(lines)
