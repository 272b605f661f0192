"""The streaming least-squares state: an orthogonal (QR) factor of ``[1 | X | y]``.

One :class:`LeastSquaresState` absorbs the rows of a window chunk by chunk and
can be merged with another state in any order and any tree shape, so partitions
can be reduced anywhere.  Its memory is O(q²) for q columns, whatever the number
of rows.  From one state over the union of a family's columns the fit of any
subset of those columns is derived without reading the rows again
(:meth:`LeastSquaresState.subset`).

Numerics
--------
* The state never forms the normal equations: each chunk is appended below the
  current triangular factor and re-triangularised with Householder QR (LAPACK
  ``dgeqrf`` through :func:`numpy.linalg.qr`), the "TSQR" scheme.
* Every column is shifted by a fixed centre (its mean in the first chunk) and
  scaled by a power of two (exact) before it enters the factor.  Centring removes
  the collinearity of each column with the intercept, which is what makes designs
  such as high-degree polynomials on an interval far from zero solvable; the
  model's coefficients are mapped back exactly afterwards.  The state always
  carries a column of ones first, so states with different centres can be merged
  (the change of centre is an upper-triangular map of the factor).
* Rank is decided on the subset's own factor: a column is aliased when the part
  of it orthogonal to the columns before it is smaller than
  :data:`RANK_TOLERANCE` times its length (lengths measured after centring, so
  the test is invariant to the columns' scales).  Aliased columns are named and
  left out; nothing is truncated silently.

References
----------
Golub, G. H. (1965). Numerical methods for solving linear least squares problems.
Numerische Mathematik 7, 206-216.
Demmel, J., Grigori, L., Hoemmen, M., Langou, J. (2012). Communication-optimal
parallel and sequential QR and LU factorizations. SIAM J. Sci. Comput. 34(1).
Björck, Å. (1996). Numerical Methods for Least Squares Problems. SIAM, ch. 2.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.linalg import solve_triangular

from .._types import FloatArray

__all__ = ["RANK_TOLERANCE", "LeastSquaresState", "SubsetFactor"]

#: A column whose component orthogonal to the earlier columns is below this
#: fraction of its (centred) length is aliased.  About 10^4.5 times the unit
#: round-off: far below anything a real, full-rank design produces (NIST's Filip
#: polynomial, the hardest StRD case, stays above 1e-9 after centring), and far
#: above the ~1e-15 a duplicate or constant column leaves.
RANK_TOLERANCE = 1e-11


def _power_of_two_scale(values: FloatArray) -> FloatArray:
    """Per column, a power of two that brings the largest absolute value near 1."""
    largest = np.max(np.abs(values), axis=0) if values.shape[0] else np.zeros(values.shape[1])
    largest = np.where(np.isfinite(largest) & (largest > 0), largest, 1.0)
    return np.ldexp(1.0, -np.frexp(largest)[1]).astype(np.float64)


@dataclass(frozen=True, slots=True)
class SubsetFactor:
    """The triangular factor of one model, derived from a state.

    Attributes
    ----------
    columns
        Indices into the state's design columns that are estimated (aliased
        ones removed), in the model's order.
    aliased
        Indices of columns found to be linear combinations of earlier ones.
    has_intercept
        Whether the model has an intercept (coefficient 0 in ``coefficients``).
    R
        Upper-triangular factor of the model's working design (centred and scaled
        columns when the model has an intercept), without the response column.
    qty
        ``Q'y`` of the working response: the response column of the factor.
    ssr
        Residual sum of squares, in the response's units.
    explained
        Model sum of squares from the factor: centred when the model has an
        intercept, uncentred otherwise.
    coefficients
        Estimates in the original units of the data (intercept first when present).
    transform
        Maps the working (centred, scaled) coefficients to the original ones:
        ``coefficients = offset + transform @ working``.
    """

    columns: tuple[int, ...]
    aliased: tuple[int, ...]
    has_intercept: bool
    R: FloatArray
    qty: FloatArray
    ssr: float
    explained: float
    coefficients: FloatArray
    transform: FloatArray
    offset: FloatArray
    response_scale: float
    n: int

    @property
    def n_parameters(self) -> int:
        return int(self.R.shape[0])

    def unscaled_covariance(self) -> FloatArray:
        """``(X'X)^-1`` in the original units (multiply by s² for the covariance)."""
        p = self.R.shape[0]
        if p == 0:
            return np.zeros((0, 0))
        inverse = solve_triangular(self.R, np.eye(p), lower=False)
        # working coefficients are in units of the scaled response: undo that scale
        G = (self.transform @ inverse) * self.response_scale
        return G @ G.T


class LeastSquaresState:
    """Mergeable TSQR state over the columns ``[1 | X | y]`` of a window.

    Parameters
    ----------
    n_columns
        Number of design columns (without intercept; the state adds its own
        column of ones).
    shift, scale
        Fixed centre and power-of-two scale for the ``n_columns + 1`` columns
        ``[X | y]``.  Taken from the first chunk when not given.
    """

    __slots__ = ("n_columns", "shift", "scale", "R", "n", "chunks_absorbed", "_buffer")

    def __init__(
        self,
        n_columns: int,
        *,
        shift: FloatArray | None = None,
        scale: FloatArray | None = None,
    ) -> None:
        self.n_columns = int(n_columns)
        self.shift = None if shift is None else np.asarray(shift, dtype=np.float64).copy()
        self.scale = None if scale is None else np.asarray(scale, dtype=np.float64).copy()
        width = self.n_columns + 2
        self.R: FloatArray = np.zeros((0, width))
        self.n = 0
        self.chunks_absorbed = 0
        self._buffer: FloatArray | None = None

    # ---------------------------------------------------------------- absorbing rows
    @property
    def width(self) -> int:
        """Columns in the factor: ones, the design columns, the response."""
        return self.n_columns + 2

    def working_rows(self, X: FloatArray, y: FloatArray, out: FloatArray | None = None) -> FloatArray:
        """The rows ``[1 | (X - shift)·scale | (y - shift_y)·scale_y]`` of a chunk."""
        assert self.shift is not None and self.scale is not None
        m = X.shape[0]
        Z = np.empty((m, self.width)) if out is None else out[:m]
        Z[:, 0] = 1.0
        np.subtract(X, self.shift[:-1], out=Z[:, 1:-1])
        Z[:, 1:-1] *= self.scale[:-1]
        np.subtract(y, self.shift[-1], out=Z[:, -1])
        Z[:, -1] *= self.scale[-1]
        return Z

    def absorb(self, X: FloatArray, y: FloatArray) -> LeastSquaresState:
        """Take in a chunk of rows (already encoded, all finite)."""
        X = np.asarray(X, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        if X.ndim != 2 or X.shape[1] != self.n_columns or y.shape != (X.shape[0],):
            raise ValueError(f"chunk of shape {X.shape}/{y.shape} does not fit a state of "
                             f"{self.n_columns} design columns")
        m = X.shape[0]
        if m == 0:
            return self
        if self.shift is None or self.scale is None:
            both = np.column_stack([X, y])
            self.shift = both.mean(axis=0)
            self.scale = _power_of_two_scale(both - self.shift)
        k = self.R.shape[0]
        rows = k + m
        if self._buffer is None or self._buffer.shape[0] < rows:
            self._buffer = np.empty((max(rows, 2 * self.width), self.width))
        buffer = self._buffer
        buffer[:k] = self.R
        self.working_rows(X, y, out=buffer[k:rows])
        self.R = np.linalg.qr(buffer[:rows], mode="r")
        self.n += m
        self.chunks_absorbed += 1
        return self

    def merge(self, other: LeastSquaresState) -> LeastSquaresState:
        """A new state holding the rows of both (any order, any tree shape)."""
        if other.n_columns != self.n_columns:
            raise ValueError("cannot merge states over different columns")
        if other.n == 0:
            return self.copy()
        if self.n == 0:
            return other.copy()
        assert self.shift is not None and self.scale is not None
        assert other.shift is not None and other.scale is not None
        # other's working columns expressed in self's centre and scale:
        # (v - s)·c = ((v - s_o)·c_o)·(c/c_o) + (s_o - s)·c   -> upper-triangular map T
        T = np.zeros((self.width, self.width))
        T[0, 0] = 1.0
        ratio = self.scale / other.scale
        T[0, 1:] = (other.shift - self.shift) * self.scale
        T[np.arange(1, self.width), np.arange(1, self.width)] = ratio
        converted = other.R @ T
        merged = LeastSquaresState(self.n_columns, shift=self.shift, scale=self.scale)
        merged.R = np.linalg.qr(np.vstack([self.R, converted]), mode="r")
        merged.n = self.n + other.n
        merged.chunks_absorbed = self.chunks_absorbed + other.chunks_absorbed
        return merged

    def copy(self) -> LeastSquaresState:
        state = LeastSquaresState(self.n_columns, shift=self.shift, scale=self.scale)
        state.R = self.R.copy()
        state.n = self.n
        state.chunks_absorbed = self.chunks_absorbed
        return state

    def square_factor(self) -> FloatArray:
        """The factor padded to ``width × width`` (zero rows while n < width)."""
        R = np.zeros((self.width, self.width))
        R[: self.R.shape[0]] = self.R[: self.width]
        return R

    # ---------------------------------------------------------------- deriving fits
    def subset(self, columns: Sequence[int], has_intercept: bool) -> SubsetFactor:
        """Factor and coefficients of the model on ``columns`` (indices into X).

        Columns that are linear combinations of earlier ones (in the order given)
        are reported in ``aliased`` and left out of the factor.
        """
        if self.shift is None or self.scale is None:
            raise ValueError("the state has absorbed no rows")
        R_full = self.square_factor()
        offset = 1 if has_intercept else 0
        order = list(columns)
        if not self._aliased_positions(self._factor_of(R_full, order, has_intercept), offset):
            return self._finish(R_full, tuple(order), (), has_intercept)
        kept: list[int] = []
        aliased: list[int] = []
        for column in order:
            factor = self._factor_of(R_full, [*kept, column], has_intercept)
            if self._aliased_positions(factor, offset + len(kept)):
                aliased.append(column)
            else:
                kept.append(column)
        return self._finish(R_full, tuple(kept), tuple(aliased), has_intercept)

    @staticmethod
    def _aliased_positions(factor: FloatArray, first: int) -> list[int]:
        """Positions (from ``first`` on) whose column is numerically dependent on earlier ones."""
        p = factor.shape[1] - 1
        diagonal = np.abs(np.diag(factor)[:p])
        lengths = np.sqrt(np.einsum("ij,ij->j", factor[:, :p], factor[:, :p]))
        return [j for j in range(first, p)
                if lengths[j] == 0.0 or diagonal[j] <= RANK_TOLERANCE * lengths[j]]

    def _design_map(self, columns: Sequence[int], has_intercept: bool) -> FloatArray:
        """Matrix M with [1|Xc|yc] @ M = the model's working columns (plus response)."""
        assert self.shift is not None and self.scale is not None
        width = self.width
        p = len(columns) + (1 if has_intercept else 0)
        M = np.zeros((width, p + 1))
        if has_intercept:
            M[0, 0] = 1.0
            for position, j in enumerate(columns, start=1):
                M[1 + j, position] = 1.0
            M[width - 1, p] = 1.0
        else:
            # uncentred columns: v·c = (v - s)·c + s·c·1
            for position, j in enumerate(columns):
                M[1 + j, position] = 1.0
                M[0, position] = self.shift[j] * self.scale[j]
            M[width - 1, p] = 1.0
            M[0, p] = self.shift[-1] * self.scale[-1]
        return M

    def _factor_of(self, R_full: FloatArray, columns: Sequence[int], has_intercept: bool) -> FloatArray:
        M = self._design_map(columns, has_intercept)
        return np.linalg.qr(R_full @ M, mode="r")

    def _finish(
        self, R_full: FloatArray, columns: tuple[int, ...], aliased: tuple[int, ...],
        has_intercept: bool,
    ) -> SubsetFactor:
        assert self.shift is not None and self.scale is not None
        factor = self._factor_of(R_full, columns, has_intercept)
        p = len(columns) + (1 if has_intercept else 0)
        R = factor[:p, :p]
        qty = factor[:p, p]
        y_scale = self.scale[-1]
        ssr = float(factor[p, p] ** 2) / y_scale**2 if factor.shape[0] > p else 0.0
        if has_intercept:
            explained = float(np.sum(qty[1:] ** 2)) / y_scale**2
        else:
            explained = float(np.sum(qty**2)) / y_scale**2
        working = solve_triangular(R, qty, lower=False) if p else np.zeros(0)
        transform = np.zeros((p, p))
        offset = np.zeros(p)
        if has_intercept:
            slopes_scale = self.scale[list(columns)] / y_scale
            transform[0, 0] = 1.0 / y_scale
            transform[0, 1:] = -self.shift[list(columns)] * slopes_scale
            transform[np.arange(1, p), np.arange(1, p)] = slopes_scale
            offset[0] = self.shift[-1]
        else:
            transform[np.arange(p), np.arange(p)] = self.scale[list(columns)] / y_scale
        coefficients = offset + transform @ working
        return SubsetFactor(columns, aliased, has_intercept, R, qty, ssr, explained,
                            coefficients, transform, offset, float(y_scale), self.n)
