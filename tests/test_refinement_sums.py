"""The family-at-once refinement sums equal the model-by-model error-free sums.

Seeded generated data (a simulated design, not a reference value); the model-by-model
route (``accurate_residuals`` + ``GradientSums.add``) is the independent derivation, and
both are compared with an exact rational computation on a few rows.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np

from monitor.stats.refine import GradientSums, accumulate_family, accurate_residuals

MODELS = [((0, 1, 2), True), ((0, 2), True), ((1, 2, 3), False), ((3,), True)]


def _data(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray, list[np.ndarray]]:
    X = rng.normal(size=(n, 4)) * np.array([1.0, 1e3, 1e-2, 50.0]) + np.array([0, 1e4, 0, 7])
    y = X @ np.array([0.5, 2e-3, 30.0, -0.1]) + 1e4 + rng.normal(size=n)
    coefficients = [rng.normal(size=len(cols) + int(icpt)) for cols, icpt in MODELS]
    return X, y, coefficients


def test_family_sums_equal_model_by_model_sums(rng: np.random.Generator) -> None:
    X, y, coefficients = _data(rng, 20_000)  # more than two of accumulate_family's row blocks
    together = [GradientSums(len(c)) for c in coefficients]
    accumulate_family(X, y, MODELS, coefficients, together)
    for (columns, has_intercept), b, sums in zip(MODELS, coefficients, together, strict=True):
        alone = GradientSums(len(b))
        part = X[:, list(columns)]
        high, low = accurate_residuals(part, y, b, has_intercept)
        alone.add(part, high, low, has_intercept)
        gradient, reference = sums.gradient, alone.gradient
        scale = np.abs(reference).max()
        assert np.max(np.abs(gradient - reference)) <= 1e-14 * scale
        assert abs(sums.ssr - alone.ssr) <= 1e-13 * alone.ssr


def test_family_sums_match_exact_rational_arithmetic(rng: np.random.Generator) -> None:
    """Near the least-squares solution X'r cancels almost completely: plain float64 loses
    most digits there, the error-free sums keep them (checked against exact fractions)."""
    X, y, _ = _data(rng, 40)
    coefficients = []
    for columns, has_intercept in MODELS:
        design = np.column_stack(([np.ones(len(y))] if has_intercept else [])
                                 + [X[:, j] for j in columns])
        coefficients.append(np.linalg.lstsq(design, y, rcond=None)[0])
    sums = [GradientSums(len(c)) for c in coefficients]
    accumulate_family(X, y, MODELS, coefficients, sums)
    for (columns, has_intercept), b, got in zip(MODELS, coefficients, sums, strict=True):
        design_exact = [[Fraction(1)] * len(y)] if has_intercept else []
        design_exact += [[Fraction(v) for v in X[:, j]] for j in columns]
        residual = [Fraction(y[i]) - sum(Fraction(b[k]) * design_exact[k][i]
                                          for k in range(len(b))) for i in range(len(y))]
        exact = np.array([float(sum(c[i] * residual[i] for i in range(len(y))))
                          for c in design_exact])
        design = np.column_stack(([np.ones(len(y))] if has_intercept else [])
                                 + [X[:, j] for j in columns])
        plain = design.T @ (y - design @ b)
        terms = np.abs(design).T @ np.abs(y - design @ b)
        # error-free: the exact value to a few units in its last place
        assert np.all(np.abs(got.gradient - exact) <= 4e-16 * np.abs(exact) + 1e-30 * terms)
        # and the cancellation is real: plain float64 is off by far more somewhere
        assert np.max(np.abs(plain - exact) / np.abs(exact)) > 1e-10
