"""Influence and outliers: externally studentized residuals with the Bonferroni test,
Cook's distance, leverage and DFFITS.

Pass 2 computes every row's leverage ``h_i = ‖R⁻ᵀw_i‖²`` and keeps counts above
the usual cut-offs (with the pass-1 residual variance) and the top rows of each
measure, named by the key column.  The reported values of the top rows are
recomputed here with the final residual sum of squares.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import stats

from ._result import CHECKS, CheckResult, not_applicable, p_value_verdict, plain, upper_verdict

if TYPE_CHECKING:
    from ..residual_pass import PassTwoResult, TopRows

__all__ = ["cooks_distance", "outlier_bonferroni"]


def _measures(result: PassTwoResult, model: int, top: TopRows) -> dict[str, np.ndarray]:
    n = result.n
    p = result.factors[model].n_parameters
    s2 = float(result.sum_squares[model]) / (n - p)
    e, h = top.residuals, top.leverages
    one_minus = 1.0 - h
    with np.errstate(divide="ignore", invalid="ignore"):
        s2_i = ((n - p) * s2 - e * e / one_minus) / (n - p - 1)
        t_ext = e / np.sqrt(s2_i * one_minus)
        cooks = e * e * h / (p * s2 * one_minus**2)
        dffits = t_ext * np.sqrt(h / one_minus)
    return {"studentized": t_ext, "cooks": cooks, "dffits": dffits, "leverage": h, "residual": e}


def _rows(result: PassTwoResult, model: int, top: TopRows) -> list[dict[str, Any]]:
    values = _measures(result, model, top)
    rows = []
    for i in range(top.rows.size):
        rows.append({"key": plain(top.keys[i]), "row": int(top.rows[i]),
                     "residual": float(values["residual"][i]),
                     "leverage": float(values["leverage"][i]),
                     "studentized_external": float(values["studentized"][i]),
                     "cooks_distance": float(values["cooks"][i]),
                     "dffits": float(values["dffits"][i])})
    return rows


def _not_enough(result: PassTwoResult, model: int, check: str) -> CheckResult | None:
    n, p = result.n, result.factors[model].n_parameters
    if p == 0:
        return not_applicable(check, "the model has no coefficients", n)
    if n - p - 1 < 1:
        return not_applicable(check, f"needs at least {p + 2} rows, the window has {n}", n)
    if result.sum_squares[model] <= 0.0:
        return not_applicable(check, "the residuals are all zero", n)
    return None


def outlier_bonferroni(result: PassTwoResult, model: int) -> CheckResult:
    """Largest |t*| with the Bonferroni p-value min(1, 2n·P(T > |t*|))."""
    missing = _not_enough(result, model, "outlier_bonferroni")
    if missing:
        return missing
    n, p = result.n, result.factors[model].n_parameters
    top = result.top["studentized"][model]
    rows = _rows(result, model, top)
    rows.sort(key=lambda r: -abs(r["studentized_external"]))
    largest = abs(rows[0]["studentized_external"]) if rows else 0.0
    df = n - p - 1
    p_value = min(1.0, 2.0 * n * float(stats.t.sf(largest, df)))
    for r in rows:
        r["bonferroni_p_value"] = min(1.0, 2.0 * n * float(
            stats.t.sf(abs(r["studentized_external"]), df)))
    thresholds = {"warn": result.options.warn_level, "fail": result.options.fail_level}
    return CheckResult(
        check="outlier_bonferroni", statistic=largest, df=df, p_value=p_value,
        verdict=p_value_verdict(p_value, thresholds["fail"], thresholds["warn"]),
        thresholds=thresholds, exact=True, sample_size=None, rows=n,
        detail={"top_rows": rows,
                "rows_beyond_bonferroni_5pct": int(result.influence_counts["bonferroni"][model]),
                "critical_value_5pct": float(stats.t.isf(0.05 / (2 * n), df))},
        reference=CHECKS["outlier_bonferroni"].reference)


def cooks_distance(result: PassTwoResult, model: int) -> CheckResult:
    """Largest Cook's distance; counts above the usual cut-offs and the top rows."""
    missing = _not_enough(result, model, "cooks_distance")
    if missing:
        return missing
    n, p = result.n, result.factors[model].n_parameters
    top = result.top["cooks"][model]
    rows = _rows(result, model, top)
    rows.sort(key=lambda r: -r["cooks_distance"])
    largest = rows[0]["cooks_distance"] if rows else 0.0
    median = float(stats.f.ppf(0.5, p, n - p))
    counts = result.influence_counts
    leverage_rows = _rows(result, model, result.top["leverage"][model])
    leverage_rows.sort(key=lambda r: -r["leverage"])
    detail = {
        "top_rows": rows,
        "top_leverage_rows": leverage_rows,
        "largest_leverage": float(result.max_leverage[model]),
        "counts": {
            "cooks_above_4_over_n": int(counts["cooks_4n"][model]),
            "cooks_above_f_median": int(counts["cooks_median"][model]),
            "cooks_above_1": int(counts["cooks_1"][model]),
            "leverage_above_2p_over_n": int(counts["leverage_2p"][model]),
            "leverage_above_3p_over_n": int(counts["leverage_3p"][model]),
            "dffits_above_2_sqrt_p_over_n": int(counts["dffits"][model]),
        },
        "cut_offs": {"cooks_4_over_n": 4.0 / n, "cooks_f_median": median, "cooks_1": 1.0,
                     "leverage_2p_over_n": 2.0 * p / n, "leverage_3p_over_n": 3.0 * p / n,
                     "dffits": 2.0 * float(np.sqrt(p / n))},
        "expected_share_above_4_over_n": "about 5 % of rows by construction at large n; "
                                         "watch the count, not single rows",
    }
    return CheckResult(
        check="cooks_distance", statistic=largest, df=(p, n - p), p_value=None,
        verdict=upper_verdict(largest, median, 1.0),
        thresholds={"warn": median, "fail": 1.0}, exact=True, sample_size=None, rows=n,
        detail=detail, reference=CHECKS["cooks_distance"].reference)
