"""Functional form: Ramsey's RESET with powers 2 and 3 of the fitted values (F form).

With ``f`` the fitted values centred (when the model has an intercept) and
scaled to unit mean square, and ``W = [f², f³]``: by Frisch–Waugh,
``SSR₀ − SSR_aug = c'S⁻¹c`` with ``S = W'W − (R⁻ᵀX'W)'(R⁻ᵀX'W)`` and
``c = W'e − (R⁻ᵀX'W)'(R⁻ᵀX'e)``, where ``R`` is the model's pass-1 factor and the
cross-products stream in pass 2.  Centring and scaling ``ŷ`` leaves the span of
``[X, ŷ², ŷ³]`` unchanged when ``X`` has an intercept (for a model without one,
``ŷ`` is only scaled).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from scipy import stats

from ._common import degenerate_residuals, own_products, projection, tested
from ._result import CheckResult, not_applicable

if TYPE_CHECKING:
    from ..residual_pass import PassTwoResult

__all__ = ["reset"]

_COLLINEAR = 1e-10


def reset(result: PassTwoResult, model: int) -> CheckResult:
    """RESET F for adding ŷ² and ŷ³; F(2, n − p − 2)."""
    n = result.n
    p = result.factors[model].n_parameters
    if p == 0:
        return not_applicable("reset", "the model has no coefficients", n)
    if n - p - 2 < 1:
        return not_applicable("reset", f"needs more than {p + 2} rows, the window has {n}", n)
    if result.reset_scale[model] <= 0.0:
        return not_applicable("reset", "the fitted values are constant", n)
    reason = degenerate_residuals(result, model)
    if reason:
        return not_applicable("reset", reason, n)
    R = result.layouts[model].R
    a = projection(R, own_products(result, model, result.ze[:, model]))
    Q1 = projection(R, own_products(result, model, result.zf[:, :, model]))
    ff = result.ff[:, model]
    gram = np.array([[ff[0], ff[1]], [ff[1], ff[2]]])
    S = gram - Q1.T @ Q1
    c = result.fe[:, model] - Q1.T @ a
    values = np.linalg.eigvalsh(S)
    if values.min() <= _COLLINEAR * max(gram[0, 0], gram[1, 1]):
        return not_applicable("reset", "the powers of the fitted values are collinear with the "
                              "regressors (the fitted values take too few distinct values)", n)
    gained = float(c @ np.linalg.solve(S, c))
    ssr0 = float(result.sum_squares[model]) - float(a @ a)
    ssr_augmented = ssr0 - gained
    df_resid = n - p - 2
    statistic = (gained / 2.0) / (ssr_augmented / df_resid)
    detail = {"powers": [2, 3], "ssr_restricted": ssr0, "ssr_augmented": ssr_augmented,
              "wald_chi2": 2.0 * statistic}
    return tested(result, "reset", statistic, (2, df_resid),
                  stats.f.sf(statistic, 2, df_resid), detail=detail)
