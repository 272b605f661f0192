"""Small helpers shared by the check modules (not public)."""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy.linalg import solve_triangular

from ..._types import FloatArray
from ._result import CHECKS, CheckResult, p_value_verdict

if TYPE_CHECKING:
    from ..residual_pass import PassTwoResult

#: Relative size below which a residual SD counts as zero (a perfect or degenerate fit).
DEGENERATE_RATIO = 1e-10


def levels(result: PassTwoResult) -> dict[str, float]:
    return {"warn": result.options.warn_level, "fail": result.options.fail_level}


def tested(result: PassTwoResult, check: str, statistic: float, df: Any, p_value: float, *,
           detail: dict[str, Any] | None = None, exact: bool = True,
           sample_size: int | None = None, rows: int | None = None) -> CheckResult:
    """A result whose verdict reads the p-value against the options' levels."""
    thresholds = levels(result)
    return CheckResult(
        check=check, statistic=float(statistic), df=df, p_value=float(p_value),
        verdict=p_value_verdict(float(p_value), thresholds["fail"], thresholds["warn"]),
        thresholds=thresholds, exact=exact, sample_size=sample_size,
        rows=int(result.n if rows is None else rows), detail=dict(detail or {}),
        reference=CHECKS[check].reference)


def label(result: PassTwoResult, column: int) -> str:
    return result.design.columns[column].label


def own_labels(result: PassTwoResult, model: int) -> list[str]:
    factor = result.factors[model]
    labels = [label(result, c) for c in factor.columns]
    return ["Intercept", *labels] if factor.has_intercept else labels


def degenerate_residuals(result: PassTwoResult, model: int) -> str | None:
    """Why the residuals cannot be tested (constant or zero), or None."""
    factor = result.factors[model]
    n = result.n
    total = factor.ssr + factor.explained
    spread = math.sqrt(max(result.m2[model], 0.0) / n) if n else 0.0
    scale = math.sqrt(total / n) if n and total > 0 else 0.0
    if n == 0:
        return "the window has no rows"
    if spread == 0.0 or spread <= DEGENERATE_RATIO * scale:
        return ("the residuals are constant (the model fits the rows exactly), so their "
                "distribution cannot be tested")
    return None


def projection(R: FloatArray, vector: FloatArray) -> FloatArray:
    """``R⁻ᵀ v``: coordinates of ``v = W'u`` in the orthonormal basis of ``W`` (``W'W = R'R``)."""
    return solve_triangular(R, vector, lower=False, trans="T")


def own_products(result: PassTwoResult, model: int, sums: FloatArray) -> FloatArray:
    """``W'v`` for the model's own working design from ``Z'v`` (rows of ``sums``)."""
    layout = result.layouts[model]
    out = sums[list(layout.own)]
    if layout.own_offset.any():
        out = out + np.multiply.outer(layout.own_offset, sums[0])
    return out
