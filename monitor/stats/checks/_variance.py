"""Constant variance: Breusch–Pagan (original and Koenker's studentized form) and White.

Both Breusch–Pagan forms regress ``u = e²`` on a constant and the model's
regressors.  Pass 2 accumulates ``Z'u`` (with ``u`` shifted by the pass-1
``SSR/n``, which leaves every slope and sum of squares unchanged but removes
cancellation), ``Σu²``; the regressors' ``X'X`` comes from the pass-1 factor, so
the explained sum of squares is ``‖R⁻ᵀ X'u‖² − (Σu)²/n`` without normal equations.
A model without intercept gets a constant in its auxiliary regression.

White's auxiliary regression adds the squares and cross-products of the
regressors.  Pass 2 keeps a TSQR factor of ``[W | u]`` over the union columns
standardised with their exact means and SDs (same span as the raw products), so
the auxiliary fit never forms normal equations; a model's auxiliary regression is
a column subset of that factor.  Columns duplicated by the design (e.g. a dummy
and its square) are dropped by a pivoted QR, and the degrees of freedom are the
resulting rank minus one.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
from scipy import stats
from scipy.linalg import qr

from ._common import degenerate_residuals, projection, tested
from ._result import CheckResult, not_applicable

if TYPE_CHECKING:
    from ..residual_pass import PassTwoResult

__all__ = ["WHITE_RANK_TOLERANCE", "breusch_pagan", "white"]

#: A pivoted-QR diagonal below this fraction of its column's length marks an exact
#: dependency of White's auxiliary columns (duplicated columns leave ~1e-16).
WHITE_RANK_TOLERANCE = 1e-9


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
    white_width = 1 + len(result.white_columns) + len(result.white_pairs)
    factor = result.white_factor
    if factor.shape[0] < factor.shape[1]:
        padding = np.zeros((factor.shape[1] - factor.shape[0], factor.shape[1]))
        factor = np.vstack([factor, padding])
    A = factor[:, positions]
    b = factor[:, white_width + model]
    _, triangle, order = qr(A, mode="economic", pivoting=True)
    diagonal = np.abs(np.diag(triangle))
    lengths = np.sqrt(np.sum(A * A, axis=0))[order]
    independent = diagonal > WHITE_RANK_TOLERANCE * np.maximum(lengths, diagonal[0])
    # pivoting puts the independent columns first; stop at the first dependent one
    rank_all = int(np.argmin(independent)) if not independent.all() else len(positions)
    basis, _ = np.linalg.qr(A[:, order[:rank_all]])
    coordinates = basis.T @ b
    rank = rank_all - 1
    if rank < 1:
        return not_applicable("white", "the auxiliary regressors are constant", n)
    if n - rank - 1 < 10:
        return not_applicable("white", f"the auxiliary regression has {rank + 1} columns and "
                              f"only {n} rows; it needs at least 10 residual degrees of freedom", n)
    sum_u = float(result.zu[0, model])
    explained = float(coordinates @ coordinates) - sum_u * sum_u / n
    total = float(result.sum_u2[model]) - sum_u * sum_u / n
    if total <= 0.0:
        return not_applicable("white", "the squared residuals are constant", n)
    statistic = n * explained / total
    f_value = (explained / rank) / ((total - explained) / (n - rank - 1))
    detail = {"auxiliary_columns": len(positions), "rank": rank + 1,
              "dropped_as_duplicates": len(positions) - 1 - rank,
              "f_statistic": f_value, "f_p_value": float(stats.f.sf(f_value, rank, n - rank - 1)),
              "r_squared_auxiliary": explained / total,
              "note": "a constant is always in the auxiliary regression"}
    if not math.isfinite(statistic):
        return not_applicable("white", "the auxiliary regression is degenerate", n)
    return tested(result, "white", statistic, rank, stats.chi2.sf(statistic, rank), detail=detail)
