"""Independence of the errors in time order: Durbin–Watson, Breusch–Godfrey, Ljung–Box.

All three need the rows in time order (pass 2 carries the last ``L`` residuals
and design rows across chunk edges); otherwise they are not applicable.

Durbin–Watson's p-value: under iid normal errors ``d = e'Ae/e'e`` has exact
mean ``P/(n−p)`` and variance ``2(Q − P·E d)/((n−p)(n−p+2))`` with ``P = tr(MA)``
and ``Q = tr((MA)²)``, computed from the streamed sums ``X'AX = ΣΔxΔx'`` and
``X'A²X = Σ(Ax)(Ax)'``; ``d/4`` is matched to a beta distribution with those two
moments (Durbin & Watson 1971; Henshaw 1966).  Against the exact (Imhof)
distribution this is within about 1e-4 in p at n = 50.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
from scipy import stats
from scipy.linalg import solve_triangular

from ._common import degenerate_residuals, projection, tested
from ._result import CheckResult, not_applicable

if TYPE_CHECKING:
    from ..residual_pass import PassTwoResult

__all__ = ["breusch_godfrey", "durbin_watson", "durbin_watson_moments", "ljung_box"]


def _unordered(result: PassTwoResult, check: str) -> CheckResult | None:
    if not result.ordered:
        return not_applicable(check, result.order_reason or "the rows are not in time order",
                              result.n)
    return None


def durbin_watson_moments(result: PassTwoResult, model: int) -> tuple[float, float]:
    """Exact null mean and variance of d given the model's design."""
    layout = result.layouts[model]
    own = list(layout.own)
    n, p = result.n, layout.R.shape[0]
    inverse = solve_triangular(layout.R, np.eye(p), lower=False)
    K = inverse.T @ result.dz_dz[np.ix_(own, own)] @ inverse
    T2 = inverse.T @ result.az_az[np.ix_(own, own)] @ inverse
    P = 2.0 * (n - 1) - float(np.trace(K))
    Q = 6.0 * n - 8.0 - 2.0 * float(np.trace(T2)) + float(np.sum(K * K.T))
    mean = P / (n - p)
    variance = 2.0 * (Q - P * mean) / ((n - p) * (n - p + 2))
    return mean, variance


def durbin_watson(result: PassTwoResult, model: int) -> CheckResult:
    """d with a one-sided p-value against positive autocorrelation (beta approximation)."""
    missing = _unordered(result, "durbin_watson")
    if missing:
        return missing
    n, p = result.n, result.factors[model].n_parameters
    if n < p + 3:
        return not_applicable("durbin_watson", f"needs at least {p + 3} rows, the window has {n}",
                              n)
    reason = degenerate_residuals(result, model)
    if reason:
        return not_applicable("durbin_watson", reason, n)
    d = float(result.dw_numerator[model] / result.lag_sums[0, model])
    mean, variance = durbin_watson_moments(result, model)
    mu, v = mean / 4.0, variance / 16.0
    common = mu * (1.0 - mu) / v - 1.0
    alpha, beta = mu * common, (1.0 - mu) * common
    p_positive = float(stats.beta.cdf(d / 4.0, alpha, beta))
    p_negative = float(stats.beta.sf(d / 4.0, alpha, beta))
    detail = {"p_value_negative_autocorrelation": p_negative, "null_mean": mean,
              "null_sd": math.sqrt(variance), "lag1_autocorrelation_approx": 1.0 - d / 2.0,
              "p_value_method": "beta distribution matched to the exact null mean and variance "
                                "of d given X (iid normal errors)"}
    if not result.factors[model].has_intercept:
        detail["note"] = "the model has no intercept; the bounds tables do not apply"
    return tested(result, "durbin_watson", d, None, p_positive, detail=detail)


def _lagged_cross(result: PassTwoResult, model: int) -> np.ndarray:
    """Σ_t e_{t−i} e_{t−j} for i, j = 1..L with pre-sample residuals 0."""
    L = result.lags
    tail = result.carry[:, model]  # tail[L-1] is the last residual
    sums = result.lag_sums[:, model]
    out = np.empty((L, L))
    for i in range(1, L + 1):
        for j in range(i, L + 1):
            d = j - i
            value = sums[d]
            for a in range(d, j):
                value -= tail[L - 1 - a + d] * tail[L - 1 - a]
            out[i - 1, j - 1] = out[j - 1, i - 1] = value
    return out


def breusch_godfrey(result: PassTwoResult, model: int) -> CheckResult:
    """LM = n·R² of e_t on a constant, X and L lagged residuals; χ²(L)."""
    missing = _unordered(result, "breusch_godfrey")
    if missing:
        return missing
    n, L = result.n, result.lags
    layout = result.layouts[model]
    k = len(layout.aux)
    if L < 1:
        return not_applicable("breusch_godfrey", f"the lag order min(10, n // 5) is 0 for n = {n}; "
                              "needs at least 5 rows", n)
    if n - k - L < 1:
        return not_applicable("breusch_godfrey", f"needs more than {k + L} rows, the window has "
                              f"{n}", n)
    reason = degenerate_residuals(result, model)
    if reason:
        return not_applicable("breusch_godfrey", reason, n)
    aux = list(layout.aux)
    a = projection(layout.aux_triangular, result.ze[aux, model])
    F = projection(layout.aux_triangular, result.z_lagged[aux, :, model])
    S = _lagged_cross(result, model) - F.T @ F
    c = result.lag_sums[1:, model] - F.T @ a
    try:
        chol = np.linalg.cholesky(S)
    except np.linalg.LinAlgError:
        return not_applicable("breusch_godfrey", "the lagged residuals are collinear", n)
    z = solve_triangular(chol, c, lower=True)
    gained = float(z @ z)
    sum_e = float(result.ze[0, model])
    ssq = float(result.lag_sums[0, model])
    total = ssq - sum_e * sum_e / n
    statistic = n * (float(a[1:] @ a[1:]) + gained) / total
    ssr_u = ssq - float(a @ a) - gained
    df_resid = n - k - L
    f_value = (gained / L) / (ssr_u / df_resid)
    detail = {"lags": L, "f_statistic": f_value, "f_df": [L, df_resid],
              "f_p_value": float(stats.f.sf(f_value, L, df_resid)),
              "presample_residuals": "set to 0, all rows kept"}
    return tested(result, "breusch_godfrey", statistic, L, stats.chi2.sf(statistic, L),
                  detail=detail)


def ljung_box(result: PassTwoResult, model: int) -> CheckResult:
    """Q = n(n+2)Σ r_k²/(n−k) of the demeaned residuals, k = 1..h; χ²(h)."""
    missing = _unordered(result, "ljung_box")
    if missing:
        return missing
    n, h = result.n, result.lags
    if h < 1 or n <= h + 1:
        return not_applicable("ljung_box", f"the lag order min(10, n // 5) is {h} for n = {n}; "
                              "needs at least 5 rows", n)
    reason = degenerate_residuals(result, model)
    if reason:
        return not_applicable("ljung_box", reason, n)
    sums = result.lag_sums[:, model]
    total = float(result.ze[0, model])
    mean = total / n
    head, tail = result.head[:, model], result.carry[:, model]
    denominator = sums[0] - n * mean * mean
    r = np.empty(h)
    for k in range(1, h + 1):
        first_k = float(head[:k].sum())
        last_k = float(tail[h - k:].sum())
        numerator = sums[k] - mean * (2.0 * total - first_k - last_k) + (n - k) * mean * mean
        r[k - 1] = numerator / denominator
    k = np.arange(1, h + 1)
    statistic = float(n * (n + 2) * np.sum(r * r / (n - k)))
    box_pierce = float(n * np.sum(r * r))
    detail = {"lags": h, "autocorrelations": r.tolist(), "box_pierce": box_pierce,
              "box_pierce_p_value": float(stats.chi2.sf(box_pierce, h)),
              "note": "χ²(h) without subtracting degrees of freedom for the model; prefer "
                      "breusch_godfrey for regression residuals"}
    return tested(result, "ljung_box", statistic, h, stats.chi2.sf(statistic, h), detail=detail)
