"""Iterative refinement of least-squares coefficients with accurately computed residuals.

The QR solution is backward stable, but its coefficients can still lose
``log10(κ)`` digits, and more when the residuals are large (the ``κ²·‖r‖`` term
of least-squares perturbation theory), and an intercept far from the data's
centre loses digits to cancellation.  One refinement step computes the
residuals ``r = y − Xb`` and the gradient ``g = X'r`` of the *original* data in
twice the working precision, using error-free transformations (Dekker's
product and Knuth's sum, vectorised over the rows of a chunk), and solves for
the correction with the triangular factor already at hand:
``(R'R) d = g`` in the model's working (centred, scaled) coordinates.  When
``u·κ² < 1`` each step gains about ``−log10(u·κ²)`` digits; when it does not
(the step does not shrink), the refinement stops and keeps the better estimate.

Pass 2 of a nightly run accumulates these sums for every model in the same
read of the rows that feeds the checks, so refinement costs no extra pass.

References
----------
Dekker, T. J. (1971). A floating-point technique for extending the available
precision. Numerische Mathematik 18, 224-242.
Ogita, T., Rump, S. M., Oishi, S. (2005). Accurate sum and dot product. SIAM J.
Sci. Comput. 26(6), 1955-1988.
Björck, Å. (1967). Iterative refinement of linear least squares solutions I.
BIT 7, 257-278.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import solve_triangular

from .._types import FloatArray
from .engine import SubsetFactor

__all__ = [
    "GradientSums",
    "accumulate_family",
    "accurate_residuals",
    "accurate_sum",
    "correction",
    "split",
    "two_product",
    "two_sum",
]

_SPLITTER = 134217729.0  # 2**27 + 1


def two_sum(a: FloatArray, b: FloatArray) -> tuple[FloatArray, FloatArray]:
    """``s + e == a + b`` exactly, with ``s = fl(a + b)`` (Knuth)."""
    s = a + b
    bb = s - a
    e = (a - (s - bb)) + (b - bb)
    return s, e


def split(a: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Dekker's split: ``a == high + low`` with each half of 26 significant bits."""
    return _split(a)


def _split(a: FloatArray) -> tuple[FloatArray, FloatArray]:
    c = _SPLITTER * a
    high = c - (c - a)
    return high, a - high


def two_product(
    a: FloatArray, b: FloatArray,
    a_parts: tuple[FloatArray, FloatArray] | None = None,
    b_parts: tuple[FloatArray, FloatArray] | None = None,
) -> tuple[FloatArray, FloatArray]:
    """``p + e == a * b`` exactly, with ``p = fl(a * b)`` (Dekker).

    ``a_parts``/``b_parts`` are Dekker splits computed before (see :func:`split`),
    so that an operand used many times is split once.
    """
    p = a * b
    a_high, a_low = _split(a) if a_parts is None else a_parts
    b_high, b_low = _split(b) if b_parts is None else b_parts
    e = ((a_high * b_high - p) + a_high * b_low + a_low * b_high) + a_low * b_low
    return p, e


def accurate_sum(values: FloatArray) -> tuple[float, float]:
    """Sum of a vector as an unevaluated pair ``(high, low)``, as if in twice the precision.

    A pairwise tree of :func:`two_sum` (vectorised per level); the rounding errors
    of each level are summed in ordinary precision, which is enough since they
    are ``u`` times smaller than the terms.
    """
    level = np.asarray(values, dtype=np.float64)
    errors = 0.0
    while level.size > 1:
        if level.size % 2:
            level = np.append(level, 0.0)
        level, error = two_sum(level[0::2], level[1::2])
        errors += float(np.sum(error))
    high = float(level[0]) if level.size else 0.0
    total, low = two_sum(np.float64(high), np.float64(errors))
    return float(total), float(low)


def accurate_residuals(
    X: FloatArray, y: FloatArray, coefficients: FloatArray, has_intercept: bool,
    X_parts: tuple[FloatArray, FloatArray] | None = None,
) -> tuple[FloatArray, FloatArray]:
    """Residuals ``y − Xb`` as pairs ``(high, low)`` accurate to about ``u²·Σ|x b|``.

    ``X`` holds the model's own columns (no intercept column); ``coefficients``
    has the intercept first when ``has_intercept``; ``X_parts`` optionally its
    :func:`split`.
    """
    high = np.array(y, dtype=np.float64, copy=True)
    low = np.zeros_like(high)
    slopes = coefficients
    if has_intercept:
        high, error = two_sum(high, np.full_like(high, -coefficients[0]))
        low += error
        slopes = coefficients[1:]
    for j, b in enumerate(slopes):
        column_parts = None if X_parts is None else (X_parts[0][:, j], X_parts[1][:, j])
        minus_b = np.float64(-b)
        product, product_error = two_product(X[:, j], minus_b, column_parts, _split(minus_b))
        high, sum_error = two_sum(high, product)
        low += product_error + sum_error
    total = high + low
    return total, low - (total - high)


@dataclass(slots=True)
class GradientSums:
    """Running ``X'r`` (as high/low pairs) and ``r'r`` of one model over chunks."""

    n_parameters: int
    high: FloatArray = field(init=False)
    low: FloatArray = field(init=False)
    ssr: float = 0.0

    def __post_init__(self) -> None:
        self.high = np.zeros(self.n_parameters)
        self.low = np.zeros(self.n_parameters)

    def add(self, X: FloatArray, r_high: FloatArray, r_low: FloatArray, has_intercept: bool,
            X_parts: tuple[FloatArray, FloatArray] | None = None) -> None:
        """Accumulate one chunk (``X`` the model's columns, residual pairs from
        :func:`accurate_residuals`, ``X_parts`` optionally the :func:`split` of ``X``)."""
        position = 0
        if has_intercept:
            self._add_entry(0, r_high, r_low)
            position = 1
        r_parts = _split(r_high)
        for j in range(X.shape[1]):
            column_parts = None if X_parts is None else (X_parts[0][:, j], X_parts[1][:, j])
            product, error = two_product(X[:, j], r_high, column_parts, r_parts)
            high, low = accurate_sum(product)
            low += float(np.sum(error + X[:, j] * r_low))
            self._add_pair(position + j, high, low)
        self.ssr += float(np.dot(r_high, r_high) + 2.0 * np.dot(r_high, r_low))

    def add_pairs(self, high: FloatArray, low: FloatArray) -> None:
        """Add per-entry pairs ``(high, low)`` (one per parameter) accurately."""
        total, error = two_sum(self.high, np.asarray(high, dtype=np.float64))
        self.high = total
        self.low = self.low + error + low

    def _add_entry(self, index: int, r_high: FloatArray, r_low: FloatArray) -> None:
        high, low = accurate_sum(r_high)
        self._add_pair(index, high, low + float(np.sum(r_low)))

    def _add_pair(self, index: int, high: float, low: float) -> None:
        total, error = two_sum(np.float64(self.high[index]), np.float64(high))
        self.high[index] = total
        self.low[index] += float(error) + low

    def merge(self, other: GradientSums) -> None:
        for index in range(self.n_parameters):
            self._add_pair(index, float(other.high[index]), float(other.low[index]))
        self.ssr += other.ssr

    @property
    def gradient(self) -> FloatArray:
        return self.high + self.low


def _row_sums(values: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Accurate sums of each row of a 2-D array, as pairs ``(high, low)``.

    The same pairwise tree of :func:`two_sum` as :func:`accurate_sum`, but on
    contiguous halves of every row at once (summation order does not matter to
    an error-free tree), so each level is a handful of vectorised operations.
    """
    level = values
    errors = np.zeros(values.shape[0])
    while level.shape[1] > 1:
        n = level.shape[1]
        half = n // 2
        a = level[:, :half]
        b = level[:, half:2 * half]
        s = a + b
        bb = s - a
        t = s - bb
        np.subtract(a, t, out=t)
        np.subtract(b, bb, out=bb)
        t += bb
        errors += t.sum(axis=1)
        if n % 2:
            first, error = two_sum(s[:, 0], level[:, n - 1])
            s[:, 0] = first
            errors += error
        level = s
    high = level[:, 0].copy() if level.shape[1] else np.zeros(values.shape[0])
    total, low = two_sum(high, errors)
    return total, low


def accumulate_family(
    X: FloatArray,
    y: FloatArray,
    models: Sequence[tuple[Sequence[int], bool]],
    coefficients: Sequence[FloatArray],
    sums: Sequence[GradientSums | None],
) -> None:
    """Accurate residuals and gradient sums of several models over one chunk.

    ``X`` holds the union design's columns of the chunk (rows x columns, no
    intercept column), ``models[m] = (columns into X, has_intercept)``,
    ``coefficients[m]`` the model's coefficients (intercept first when present);
    ``sums[m]`` receives the chunk (``None`` skips the model).  The same
    arithmetic as :func:`accurate_residuals` followed by :meth:`GradientSums.add`,
    arranged for speed: the design is transposed so that every column is
    contiguous and split once for every model, each residual column update is
    done in place in reused buffers, and each model's gradient entries are formed
    for all of its columns at once.
    """
    y = np.asarray(y, dtype=np.float64)
    rows = X.shape[0]
    # rows in blocks small enough that the work arrays stay in a core's cache
    for start in range(0, rows, _BLOCK_ROWS):
        stop = min(start + _BLOCK_ROWS, rows)
        _accumulate_block(X[start:stop], y[start:stop], models, coefficients, sums)


#: Rows per block of :func:`accumulate_family` (its work arrays then fit in L2 cache).
_BLOCK_ROWS = 8192


def _accumulate_block(
    X: FloatArray,
    y: FloatArray,
    models: Sequence[tuple[Sequence[int], bool]],
    coefficients: Sequence[FloatArray],
    sums: Sequence[GradientSums | None],
) -> None:
    m = X.shape[0]
    # the design as rows [1 | X]', split once for every model (the ones row splits
    # into (1, 0), so a model's intercept entry of X'r is formed like the others)
    XT = np.empty((X.shape[1] + 1, m))
    XT[0] = 1.0
    XT[1:] = X.T
    XT_high, XT_low = _split(XT)
    high = np.empty(m)
    low = np.empty(m)
    product = np.empty(m)
    error = np.empty(m)
    work = np.empty(m)
    spare = np.empty(m)
    for (columns, has_intercept), b, target in zip(models, coefficients, sums, strict=True):
        if target is None:
            continue
        rows = [1 + int(c) for c in columns]
        high[:] = y
        low[:] = 0.0
        slopes = b
        if has_intercept:
            _two_sum_into(high, np.float64(-b[0]), low, work, error)
            slopes = b[1:]
        for j, coefficient in zip(rows, slopes, strict=True):
            minus_b = np.float64(-coefficient)
            b_high, b_low = _split(minus_b)
            x, x_high, x_low = XT[j], XT_high[j], XT_low[j]
            # Dekker: product + error == x * (-b)
            np.multiply(x, minus_b, out=product)
            np.multiply(x_high, b_high, out=error)
            error -= product
            np.multiply(x_high, b_low, out=work)
            error += work
            np.multiply(x_low, b_high, out=work)
            error += work
            np.multiply(x_low, b_low, out=work)
            error += work
            # Knuth: high + product == s + (a - (s - bb)) + (product - bb), bb = s - high
            s_, bb = spare, work
            np.add(high, product, out=s_)
            np.subtract(s_, high, out=bb)
            np.subtract(product, bb, out=product)
            np.subtract(s_, bb, out=bb)
            np.subtract(high, bb, out=bb)
            bb += product
            bb += error
            low += bb
            high, spare = s_, high
        r_high = high + low
        r_low = low - (r_high - high)
        if has_intercept:
            rows = [0, *rows]
        if not rows:
            continue
        Xm = XT[rows]
        Xm_high = XT_high[rows]
        Xm_low = XT_low[rows]
        r_hh, r_hl = _split(r_high)
        P = Xm * r_high
        E = Xm_high * r_hh
        E -= P
        T = Xm_high * r_hl
        E += T
        np.multiply(Xm_low, r_hh, out=T)
        E += T
        np.multiply(Xm_low, r_hl, out=T)
        E += T
        entries_high, entries_low = _row_sums(P)
        target.add_pairs(entries_high, entries_low + E.sum(axis=1) + Xm @ r_low)
        target.ssr += float(np.dot(r_high, r_high) + 2.0 * np.dot(r_high, r_low))


def _two_sum_into(high: FloatArray, addend: FloatArray | np.float64, low: FloatArray,
                  work: FloatArray, error: FloatArray) -> None:
    """``high, e = two_sum(high, addend)``; ``low += e``, in place (``work``/``error`` scratch)."""
    np.add(high, addend, out=work)            # s
    np.subtract(work, high, out=error)        # bb = s - a
    np.subtract(addend, error, out=error)     # b - bb
    low += error
    np.subtract(work, np.subtract(work, high, out=error), out=error)  # s - bb
    np.subtract(high, error, out=error)       # a - (s - bb)
    low += error
    high[:] = work


def correction(factor: SubsetFactor, gradient: FloatArray) -> FloatArray:
    """Coefficient correction ``d`` with ``(X'X) d = X'r``, solved with the model's factor.

    In working coordinates ``W = c_y·X·T`` (see :class:`SubsetFactor`), so
    ``W'W dw = c_y²·T'g`` and ``d = T·dw``.
    """
    if factor.n_parameters == 0:
        return np.zeros(0)
    scaled = factor.response_scale**2 * (factor.transform.T @ gradient)
    half = solve_triangular(factor.R, scaled, lower=False, trans="T")
    working = solve_triangular(factor.R, half, lower=False)
    return factor.transform @ working
