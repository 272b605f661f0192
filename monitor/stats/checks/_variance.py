"""Constant variance: Breusch–Pagan (original and Koenker's studentized form) and White.

Both Breusch–Pagan forms regress ``u = e²`` on a constant and the model's
regressors.  Pass 2 accumulates ``Z'u`` (with ``u`` shifted by the pass-1
``SSR/n``, which leaves every slope and sum of squares unchanged but removes
cancellation), ``Σu²``; the regressors' ``X'X`` comes from the pass-1 factor, so
the explained sum of squares is ``‖R⁻ᵀ X'u‖² − (Σu)²/n`` without normal equations.
A model without intercept gets a constant in its auxiliary regression.

White's auxiliary regression adds the squares and cross-products of the
regressors.  Pass 2 accumulates the cross-products of the union columns and
their products, every one centred and scaled with its exact mean and SD from the
pass-1 factor (same span as the raw products; no cancellation, so the result
does not depend on the chunking); a model's auxiliary regression is a subset of
them, solved through the eigenvalues of its correlation matrix.  Columns
duplicated by the design (e.g. a dummy and its square) are dropped by rank, and
the degrees of freedom are that rank.  (A streamed QR of the same columns is 13
times slower per row and was not needed for 1e-10 agreement.)
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
from scipy import stats

from ._common import degenerate_residuals, projection, tested
from ._result import CheckResult, not_applicable

if TYPE_CHECKING:
    from ..residual_pass import PassTwoResult

__all__ = ["WHITE_RANK_TOLERANCE", "breusch_pagan", "white"]

#: Eigenvalues of the auxiliary correlation matrix below this fraction of the largest
#: are treated as exact dependencies (duplicated columns leave ~1e-16).
WHITE_RANK_TOLERANCE = 1e-10


def _bp_parts(result: PassTwoResult, model: int) -> tuple[float, float, int]:
    layout = result.layouts[model]
    aux = list(layout.aux)
    a = projection(layout.aux_triangular, result.zu[aux, model])
    explained = float(a[1:] @ a[1:])
    sum_u = float(result.zu[0, model])
    total = float(result.sum_u2[model]) - sum_u * sum_u / result.n
    return explained, total, len(aux) - 1


def breusch_pagan(result: PassTwoResult, model: int, *, studentized: bool) -> CheckResult:
    """Breusch–Pagan LM: original ``ESS/(2σ̂⁴)`` or Koenker's ``n·R²``; χ²(q)."""
    check = "breusch_pagan_studentized" if studentized else "breusch_pagan"
    n = result.n
    reason = degenerate_residuals(result, model)
    if reason:
        return not_applicable(check, reason, n)
    explained, total, q = _bp_parts(result, model)
    if q == 0:
        return not_applicable(check, "the model has no regressors besides the constant", n)
    if n <= q + 1:
        return not_applicable(check, f"needs more than {q + 1} rows, the window has {n}", n)
    if total <= 0.0:
        return not_applicable(check, "the squared residuals are constant", n)
    sigma2_ml = float(result.sum_squares[model]) / n
    if studentized:
        statistic = n * explained / total
    else:
        statistic = explained / (2.0 * sigma2_ml**2)
    f_value = (explained / q) / ((total - explained) / (n - q - 1))
    detail = {"regressors": q, "f_statistic": f_value,
              "f_p_value": float(stats.f.sf(f_value, q, n - q - 1)),
              "r_squared_auxiliary": explained / total}
    if not studentized:
        detail["note"] = "assumes normal errors; the studentized form does not"
    return tested(result, check, statistic, q, stats.chi2.sf(statistic, q), detail=detail)


def _white_positions(result: PassTwoResult, model: int) -> list[int] | None:
    columns = result.layouts[model].union_columns
    if not result.white_pairs or not set(columns) <= set(result.white_columns):
        return None
    where = {c: i for i, c in enumerate(result.white_columns)}
    first = [1 + where[c] for c in columns]
    base = 1 + len(result.white_columns)
    wanted = set(columns)
    second = [base + i for i, (a, b) in enumerate(result.white_pairs)
              if a in wanted and b in wanted]
    return [0, *first, *second]


def white(result: PassTwoResult, model: int) -> CheckResult:
    """White's LM = n·R² of e² on the regressors, their squares and cross-products."""
    n = result.n
    reason = degenerate_residuals(result, model)
    if reason:
        return not_applicable("white", reason, n)
    k = len(result.layouts[model].union_columns)
    if k == 0:
        return not_applicable("white", "the model has no regressors besides the constant", n)
    positions = _white_positions(result, model)
    width = 1 + k + k * (k + 1) // 2
    if positions is None:
        why = result.white_skip or (f"the auxiliary design would have {width} columns (limit "
                                    f"{result.options.white_max_columns})")
        return not_applicable("white", f"skipped: {why}", n)
    S = result.white_zz[np.ix_(positions, positions)]
    g = result.white_zu[positions, model]
    sums = S[0, 1:]
    centred = S[1:, 1:] - np.outer(sums, sums) / n
    g_centred = g[1:] - sums * g[0] / n
    scale = np.sqrt(np.clip(np.diag(centred), 0.0, None))
    live = scale > 0
    if not live.any():
        return not_applicable("white", "the auxiliary regressors are constant", n)
    correlation = centred[np.ix_(live, live)] / np.outer(scale[live], scale[live])
    values, vectors = np.linalg.eigh(correlation)
    keep = values > WHITE_RANK_TOLERANCE * values.max()
    rank = int(keep.sum())
    if n - rank - 1 < 10:
        return not_applicable("white", f"the auxiliary regression has {rank + 1} columns and "
                              f"only {n} rows; it needs at least 10 residual degrees of freedom", n)
    coordinates = vectors[:, keep].T @ (g_centred[live] / scale[live])
    explained = float(np.sum(coordinates**2 / values[keep]))
    sum_u = float(result.zu[0, model])
    total = float(result.sum_u2[model]) - sum_u * sum_u / n
    if total <= 0.0:
        return not_applicable("white", "the squared residuals are constant", n)
    statistic = n * explained / total
    f_value = (explained / rank) / ((total - explained) / (n - rank - 1))
    detail = {"auxiliary_columns": len(positions), "rank": rank + 1,
              "dropped_as_duplicates": len(positions) - 1 - rank,
              "f_statistic": f_value, "f_p_value": float(stats.f.sf(f_value, rank, n - rank - 1)),
              "r_squared_auxiliary": explained / total,
              "auxiliary_condition_number": float(values[keep].max() / values[keep].min()),
              "note": "a constant is always in the auxiliary regression; the statistic's "
                      "relative rounding error is about 1e-16 times the auxiliary "
                      "condition number"}
    if not math.isfinite(statistic):
        return not_applicable("white", "the auxiliary regression is degenerate", n)
    return tested(result, "white", statistic, rank, stats.chi2.sf(statistic, rank), detail=detail)
