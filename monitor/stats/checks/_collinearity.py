"""Collinearity from the pass-1 factor: variance inflation factors and BKW condition indices.

* VIF_j = C_jj·(C⁻¹)_jj with C the centred cross-products of the model's
  non-constant columns: the lower-right block ``R₂₂`` of the factor of
  ``[1 | X]`` gives ``C = R₂₂'R₂₂``, so VIF_j = ‖R₂₂[:, j]‖²·‖R₂₂⁻¹[j, :]‖²
  (centred even for a model without intercept, as statsmodels ≥ 0.15 does).
* Condition indices: singular values of the design with every column (the
  intercept included) scaled to unit length, not centred, computed from the
  factor as the singular values of ``R·T·D^(−1/2)`` (``T`` maps working to
  original columns), which never squares the condition number.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from scipy.linalg import solve_triangular

from ._common import label, own_labels
from ._result import CHECKS, CheckResult, not_applicable, upper_verdict

if TYPE_CHECKING:
    from ..residual_pass import PassTwoResult

__all__ = ["condition_index", "variance_inflation"]

VIF_WARN, VIF_FAIL = 5.0, 10.0
CONDITION_WARN, CONDITION_FAIL = 30.0, 100.0


def variance_inflation(result: PassTwoResult, model: int) -> CheckResult:
    """The largest VIF over the model's terms (each term's value in detail)."""
    n = result.n
    layout = result.layouts[model]
    columns = [c - 1 for c in layout.aux[1:]]
    if not columns:
        return not_applicable("vif", "the model has no terms besides the intercept", n)
    R22 = layout.aux_triangular[1:, 1:]
    inverse = solve_triangular(R22, np.eye(R22.shape[0]), lower=False)
    vif = np.sum(R22 * R22, axis=0) * np.sum(inverse * inverse, axis=1)
    terms = {label(result, c): float(v) for c, v in zip(columns, vif, strict=True)}
    largest = float(vif.max())
    worst = max(terms, key=terms.__getitem__)
    return CheckResult(
        check="vif", statistic=largest, df=None, p_value=None,
        verdict=upper_verdict(largest, VIF_WARN, VIF_FAIL),
        thresholds={"warn": VIF_WARN, "fail": VIF_FAIL}, exact=True, sample_size=None,
        rows=n, detail={"terms": terms, "largest_term": worst,
                        "thresholds_source": "5: statsmodels documentation; 10: Marquardt "
                        "(1970), Kutner et al. (2005)"},
        reference=CHECKS["vif"].reference)


def condition_index(result: PassTwoResult, model: int) -> CheckResult:
    """The largest BKW condition index (scaled, uncentred columns)."""
    n = result.n
    state = result.state
    factor = result.factors[model]
    p = factor.n_parameters
    if p == 0:
        return not_applicable("condition_index", "the model has no coefficients", n)
    assert state.shift is not None and state.scale is not None
    columns = list(factor.columns)
    T = np.zeros((p, p))
    if factor.has_intercept:
        T[0, 0] = 1.0
        T[0, 1:] = state.shift[columns]
        T[np.arange(1, p), np.arange(1, p)] = 1.0 / state.scale[columns]
    else:
        T[np.arange(p), np.arange(p)] = 1.0 / state.scale[columns]
    original = result.layouts[model].R @ T
    lengths = np.sqrt(np.sum(original * original, axis=0))
    _, singular, vt = np.linalg.svd(original / lengths)
    indices = singular[0] / singular
    phi = (vt.T**2) / singular**2          # phi[j, k] = v_jk² / μ_k²
    proportions = phi / phi.sum(axis=1, keepdims=True)
    labels = own_labels(result, model)
    rows = []
    for k, eta in enumerate(indices):
        shares = {labels[j]: float(proportions[j, k]) for j in range(p)}
        rows.append({"condition_index": float(eta), "variance_proportions": shares})
    flagged = [r for r in rows if r["condition_index"] > CONDITION_WARN
               and sum(v > 0.5 for v in r["variance_proportions"].values()) >= 2]
    largest = float(indices.max())
    return CheckResult(
        check="condition_index", statistic=largest, df=None, p_value=None,
        verdict=upper_verdict(largest, CONDITION_WARN, CONDITION_FAIL),
        thresholds={"warn": CONDITION_WARN, "fail": CONDITION_FAIL}, exact=True,
        sample_size=None, rows=n,
        detail={"indices": rows, "dependencies": flagged,
                "convention": "columns scaled to unit length, not centred, intercept included"},
        reference=CHECKS["condition_index"].reference)
