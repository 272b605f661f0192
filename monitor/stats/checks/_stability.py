"""Stability: the OLS-based CUSUM in time order and the Chow test at a break date.

OLS CUSUM (Ploberger & Krämer 1992): ``B_t = Σ_{s≤t} e_s / √(n·σ̂²)`` with
``σ̂² = SSR/(n − p)`` (R strucchange's convention; statsmodels
``breaks_cusumolsresid(resid, ddof=p)``); ``sup|B_t|`` is compared with the
supremum of a Brownian bridge (Kolmogorov distribution).  Chow (1960): the
segments' sums of squares come from two least-squares states filled in pass 2.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from scipy import stats

from ._common import degenerate_residuals, tested
from ._result import CheckResult, not_applicable, plain

if TYPE_CHECKING:
    from ..engine import LeastSquaresState
    from ..residual_pass import PassTwoResult

__all__ = ["chow_from_states", "chow_test", "cusum"]


def cusum(result: PassTwoResult, model: int) -> CheckResult:
    """sup |B_t| of the OLS residuals' cumulative sum; p from the Brownian bridge."""
    n, p = result.n, result.factors[model].n_parameters
    if not result.ordered:
        return not_applicable("cusum", result.order_reason or "the rows are not in time order", n)
    if n - p < 2:
        return not_applicable("cusum", f"needs at least {p + 2} rows, the window has {n}", n)
    reason = degenerate_residuals(result, model)
    if reason:
        return not_applicable("cusum", reason, n)
    sigma2 = float(result.sum_squares[model]) / (n - p)
    statistic = float(result.cusum_max[model]) / math.sqrt(n * sigma2)
    from ..changepoint import estimate_change  # changepoint imports this package's _result

    change = estimate_change(result, model)
    detail = {
        "largest_at_row": int(result.cusum_argmax[model]),
        "largest_at_key": plain(result.cusum_argmax_key[model]),
        "sigma_convention": "SSR/(n − p)",
        "critical_values": {"1%": 1.63, "5%": 1.36, "10%": 1.22},
        "change": change.to_dict() if change is not None else None,
    }
    return tested(result, "cusum", statistic, None, float(stats.kstwobign.sf(statistic)),
                  detail=detail)


def chow_from_states(pooled_ssr: float, first: LeastSquaresState,
                     second: LeastSquaresState, columns: tuple[int, ...], has_intercept: bool,
                     p: int) -> tuple[float, tuple[int, int], float, dict[str, float]] | str:
    """F of Chow's test from the two segments' states; a reason string when it cannot run."""
    n1, n2 = first.n, second.n
    if n1 <= p or n2 <= p:
        return (f"each segment needs more than {p} rows (one more than the coefficients); "
                f"they have {n1} and {n2}")
    ssr1 = first.subset(columns, has_intercept).ssr
    ssr2 = second.subset(columns, has_intercept).ssr
    df2 = n1 + n2 - 2 * p
    if df2 < 1:
        return f"needs more than {2 * p} rows in all"
    unrestricted = ssr1 + ssr2
    if unrestricted <= 0.0:
        return "both segments are fitted exactly"
    statistic = ((pooled_ssr - unrestricted) / p) / (unrestricted / df2)
    return statistic, (p, df2), float(stats.f.sf(statistic, p, df2)), {
        "rows_before": n1, "rows_after": n2, "ssr_before": ssr1, "ssr_after": ssr2,
        "ssr_pooled": pooled_ssr}


def chow_test(result: PassTwoResult, model: int) -> CheckResult | None:
    """Chow's F at the break value of the time column (None when no break was asked for)."""
    if result.break_value is None:
        return None
    n = result.n
    if result.state_before is None or result.state_after is None:
        return not_applicable("chow", "a break date needs a time column", n)
    factor = result.factors[model]
    p = factor.n_parameters
    outcome = chow_from_states(factor.ssr, result.state_before, result.state_after,
                               factor.columns, factor.has_intercept, p)
    if isinstance(outcome, str):
        return not_applicable("chow", outcome, n)
    statistic, df, p_value, detail = outcome
    detail = {"break": plain(result.break_value), "assumes": "equal error variance in both "
              "segments", **detail}
    return tested(result, "chow", statistic, df, p_value, detail=detail)
