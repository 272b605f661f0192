"""Pass 2: one more read of the rows, for every candidate model at once.

Pass 1 (:mod:`monitor.stats.fitting`) leaves one least-squares state over the
union of a family's columns and every model's factor.  Pass 2 reads the chunks
again, encodes each chunk once (:meth:`Design.encode`), and computes every
model's residuals with ONE matrix product ``Z @ B`` per chunk, where ``Z`` holds
the chunk's centred, power-of-two-scaled design rows (the state's working
coordinates, so the residuals do not lose digits to a large offset) and ``B``
stacks every model's coefficients (and, with a baseline, the frozen baseline
coefficients too).  It accumulates, for all models together, what the checks
need and nothing that grows with the rows:

* power sums merged across chunks (Pébay's pairwise update) for Jarque–Bera and
  D'Agostino–Pearson;
* cross-products of the design with ``e``, with ``e² − σ̂²`` (Breusch–Pagan), with
  the second-order products of the design (White), with powers of the fitted
  values (RESET), and with lagged residuals (Breusch–Godfrey), where the model's
  own ``X'X`` comes from its pass-1 factor, never from normal equations;
* in time order, with the last ``L`` rows carried across chunk edges: lagged
  residual products (Ljung–Box, Breusch–Godfrey), squared differences
  (Durbin–Watson) and the first and second differences of the design (the exact
  null mean and variance of Durbin–Watson's d), the running residual sum (OLS
  CUSUM) with its largest excursions and a thinned path;
* per row, leverage ``‖R⁻ᵀw_i‖²``, externally studentized residuals, Cook's
  distance and DFFITS, kept only as counts above cut-offs and top-k rows by key;
* a seeded bottom-k reservoir of rows (random priorities drawn row by row from
  one generator, so the sample does not depend on how the rows are chunked);
* a fine histogram of each model's residuals (for the baseline's quantile bins),
  regressor ranges, and with a baseline the drift sums of the frozen model;
* one refinement step of every model's coefficients with accurately computed
  residuals (:mod:`monitor.stats.refine`), so a nightly run reads the rows
  exactly twice; :attr:`PassTwoResult.refined_coefficients`.

Peak memory: one chunk, ``O(models × columns²)`` sums, and the samples.

API
---
``residual_pass(chunks, design, state, factors, coefficients, *, time_column=None,
key_column=None, in_time_order=True, baseline=None, break_value=None,
options=CheckOptions()) -> PassTwoResult``, then
:func:`monitor.stats.checks.run_checks` ``(pass_two, model_index) -> tuple[CheckResult, ...]``.

Time order: order-dependent checks need ``time_column`` (its values must not
decrease, within and across chunks) and ``in_time_order=True``; otherwise they
report "not applicable" with the reason.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import stats
from scipy.linalg import solve_triangular

from .._types import FloatArray
from .engine import LeastSquaresState, SubsetFactor
from .formula import Design
from .refine import GradientSums, accumulate_family, correction

if TYPE_CHECKING:
    from .drift import BaselineSnapshot

__all__ = ["CheckOptions", "ModelLayout", "PassTwoResult", "TopRows", "residual_pass"]


@dataclass(frozen=True, slots=True)
class CheckOptions:
    """Knobs of pass 2 and of the checks (all have documented defaults).

    Attributes
    ----------
    sample_size
        Rows in the seeded random sample used by Shapiro–Wilk, Anderson–Darling,
        the KS/AD drift tests and the baseline's stored sample (5000: scipy's
        Shapiro–Wilk p-value is accurate up to there).
    seed
        Seed of the sample's random priorities (seeds arrive as arguments).
    top_rows
        Rows kept per influence measure.
    lags
        Lag order of Breusch–Godfrey and Ljung–Box; ``None`` = ``min(10, n // 5)``
        (the statsmodels default).
    white_max_columns
        White's test is skipped when its auxiliary design would have more columns.
    refine
        Accumulate one refinement step of every model's coefficients.
    fail_level, warn_level
        p-value levels of the verdicts (p < fail_level fails, p < warn_level warns).
    path_points
        Points kept of each model's cumulative-sum path (for the change view).
    grid_bins
        Fine histogram bins of the residuals over ±8 residual SDs (baseline bins).
    psi_bins
        Quantile bins of the baseline used by the PSI.
    """

    sample_size: int = 5000
    seed: int = 20240917
    top_rows: int = 10
    lags: int | None = None
    white_max_columns: int = 120
    refine: bool = True
    fail_level: float = 0.01
    warn_level: float = 0.05
    path_points: int = 512
    grid_bins: int = 4096
    psi_bins: int = 10


@dataclass(frozen=True, slots=True)
class ModelLayout:
    """Where a model's columns sit in the chunk's working rows ``Z = [1 | Xs]``.

    ``own`` / ``own_offset``: the model's working design ``W = Z[:, own] + own_offset``
    (the offset turns centred columns back into uncentred ones for a model without
    intercept), whose triangular factor is ``R``.  ``aux`` / ``aux_triangular``: the
    model's columns with a constant first, for auxiliary regressions that need one.
    """

    own: tuple[int, ...]
    own_offset: FloatArray
    R: FloatArray
    aux: tuple[int, ...]
    aux_triangular: FloatArray
    union_columns: tuple[int, ...]


@dataclass(slots=True)
class TopRows:
    """The rows with the largest values of one measure (value, row number, key, extras)."""

    capacity: int
    values: FloatArray = field(default_factory=lambda: np.zeros(0))
    rows: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    keys: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=object))
    residuals: FloatArray = field(default_factory=lambda: np.zeros(0))
    leverages: FloatArray = field(default_factory=lambda: np.zeros(0))

    def offer(self, values: FloatArray, rows: np.ndarray, keys: np.ndarray,
              residuals: FloatArray, leverages: FloatArray) -> None:
        if values.size == 0:
            return
        if self.values.size >= self.capacity:
            keep = values > self.values.min()
            if not keep.any():
                return
            values, rows, keys = values[keep], rows[keep], keys[keep]
            residuals, leverages = residuals[keep], leverages[keep]
        if values.size > self.capacity:
            pick = np.argpartition(-values, self.capacity - 1)[: self.capacity]
            values, rows, keys = values[pick], rows[pick], keys[pick]
            residuals, leverages = residuals[pick], leverages[pick]
        all_values = np.concatenate([self.values, values])
        all_rows = np.concatenate([self.rows, rows])
        all_keys = np.concatenate([self.keys, keys.astype(object)])
        all_res = np.concatenate([self.residuals, residuals])
        all_lev = np.concatenate([self.leverages, leverages])
        order = np.lexsort((all_rows, -all_values))[: self.capacity]
        self.values, self.rows, self.keys = all_values[order], all_rows[order], all_keys[order]
        self.residuals, self.leverages = all_res[order], all_lev[order]


@dataclass(slots=True)
class PassTwoResult:
    """The aggregates of pass 2 for every model of a family (working state, not a record).

    Arrays indexed ``[..., m]`` hold model ``m``; ``[j]`` over the working columns
    ``Z = [1 | Xs]`` (``Xs`` the state's centred, scaled union columns).
    """

    design: Design
    state: LeastSquaresState
    factors: tuple[SubsetFactor, ...]
    coefficients: tuple[FloatArray, ...]
    layouts: tuple[ModelLayout, ...]
    options: CheckOptions
    n: int = 0
    rows_read: int = 0
    chunks: int = 0
    # moments of the residuals
    mean: FloatArray = field(default_factory=lambda: np.zeros(0))
    m2: FloatArray = field(default_factory=lambda: np.zeros(0))
    m3: FloatArray = field(default_factory=lambda: np.zeros(0))
    m4: FloatArray = field(default_factory=lambda: np.zeros(0))
    sum_squares: FloatArray = field(default_factory=lambda: np.zeros(0))
    ze: FloatArray = field(default_factory=lambda: np.zeros(0))            # Z'e  (q+1, M)
    # Breusch–Pagan: u = e² − u_shift
    u_shift: FloatArray = field(default_factory=lambda: np.zeros(0))
    zu: FloatArray = field(default_factory=lambda: np.zeros(0))            # Z'u  (q+1, M)
    sum_u2: FloatArray = field(default_factory=lambda: np.zeros(0))
    # White over the second-order products of the eligible columns
    white_columns: tuple[int, ...] = ()
    white_pairs: tuple[tuple[int, int], ...] = ()
    white_skip: str | None = None
    white_zz: FloatArray = field(default_factory=lambda: np.zeros((0, 0)))    # W'W
    white_zu: FloatArray = field(default_factory=lambda: np.zeros((0, 0)))    # W'u
    white_centre: FloatArray = field(default_factory=lambda: np.zeros(0))
    white_product_centre: FloatArray = field(default_factory=lambda: np.zeros(0))
    white_spread: FloatArray = field(default_factory=lambda: np.zeros(0))
    # RESET: f = (ŷ − reset_shift)/reset_scale; sums with f², f³
    reset_shift: FloatArray = field(default_factory=lambda: np.zeros(0))
    reset_scale: FloatArray = field(default_factory=lambda: np.zeros(0))
    zf: FloatArray = field(default_factory=lambda: np.zeros(0))            # Z'[f² f³] (q+1, 2, M)
    ff: FloatArray = field(default_factory=lambda: np.zeros(0))            # f2f2, f2f3, f3f3
    fe: FloatArray = field(default_factory=lambda: np.zeros(0))            # (2, M)
    # influence
    influence_sigma2: FloatArray = field(default_factory=lambda: np.zeros(0))
    influence_counts: dict[str, FloatArray] = field(default_factory=dict)
    max_leverage: FloatArray = field(default_factory=lambda: np.zeros(0))
    top: dict[str, list[TopRows]] = field(default_factory=dict)
    # time order
    ordered: bool = True
    order_reason: str | None = None
    lags: int = 0
    lag_sums: FloatArray = field(default_factory=lambda: np.zeros(0))      # (L+1, M)
    z_lagged: FloatArray = field(default_factory=lambda: np.zeros(0))      # (q+1, L, M)
    head: FloatArray = field(default_factory=lambda: np.zeros(0))          # first L residuals
    carry: FloatArray = field(default_factory=lambda: np.zeros(0))         # last L residuals
    dw_numerator: FloatArray = field(default_factory=lambda: np.zeros(0))
    dz_dz: FloatArray = field(default_factory=lambda: np.zeros(0))         # Σ ΔzΔz'
    az_az: FloatArray = field(default_factory=lambda: np.zeros(0))         # Σ (Az)(Az)'
    cusum_sum: FloatArray = field(default_factory=lambda: np.zeros(0))
    cusum_max: FloatArray = field(default_factory=lambda: np.zeros(0))
    cusum_argmax: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    cusum_argmax_key: list[Any] = field(default_factory=list)
    change_stat: FloatArray = field(default_factory=lambda: np.zeros(0))
    change_index: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    change_key: list[Any] = field(default_factory=list)
    change_partial: FloatArray = field(default_factory=lambda: np.zeros(0))
    path_index: list[np.ndarray] = field(default_factory=list)
    path_values: list[FloatArray] = field(default_factory=list)
    path_keys: list[np.ndarray] = field(default_factory=list)
    first_time: Any = None
    last_time: Any = None
    # Chow at a break value of the time column
    break_value: Any = None
    state_before: LeastSquaresState | None = None
    state_after: LeastSquaresState | None = None
    # sample (bottom-k random priorities)
    sample_priority: FloatArray = field(default_factory=lambda: np.zeros(0))
    sample_residuals: FloatArray = field(default_factory=lambda: np.zeros((0, 0)))
    sample_frozen: FloatArray = field(default_factory=lambda: np.zeros((0, 0)))
    sample_design: FloatArray = field(default_factory=lambda: np.zeros((0, 0)))
    sample_keys: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=object))
    sample_fitted: FloatArray = field(default_factory=lambda: np.zeros((0, 0)))
    # residual histogram on a fine grid (baseline quantile bins)
    grid_low: FloatArray = field(default_factory=lambda: np.zeros(0))
    grid_width: FloatArray = field(default_factory=lambda: np.zeros(0))
    grid_counts: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    # Levene sums |e − ē| around the mean known from pass 1
    residual_centre: FloatArray = field(default_factory=lambda: np.zeros(0))
    levene_sum: FloatArray = field(default_factory=lambda: np.zeros(0))
    levene_sum2: FloatArray = field(default_factory=lambda: np.zeros(0))
    column_min: FloatArray = field(default_factory=lambda: np.zeros(0))
    column_max: FloatArray = field(default_factory=lambda: np.zeros(0))
    # drift against a baseline
    baseline: BaselineSnapshot | None = None
    frozen_mean: FloatArray = field(default_factory=lambda: np.zeros(0))
    frozen_m2: FloatArray = field(default_factory=lambda: np.zeros(0))
    frozen_sum_squares: FloatArray = field(default_factory=lambda: np.zeros(0))
    frozen_centre: FloatArray = field(default_factory=lambda: np.zeros(0))
    frozen_levene_sum: FloatArray = field(default_factory=lambda: np.zeros(0))
    frozen_levene_sum2: FloatArray = field(default_factory=lambda: np.zeros(0))
    frozen_bins: list[np.ndarray] = field(default_factory=list)
    covered: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    baseline_leverage_sum: FloatArray = field(default_factory=lambda: np.zeros(0))
    beyond_leverage: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    outside_range: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    outside_either: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    regressor_bins: list[np.ndarray] = field(default_factory=list)
    # refinement
    gradients: list[GradientSums] = field(default_factory=list)
    refined_coefficients: tuple[FloatArray, ...] = ()
    refined_ssr: tuple[float, ...] = ()
    refinement_step: tuple[float, ...] = ()

    @property
    def n_models(self) -> int:
        return len(self.factors)

    def ssr(self, m: int) -> float:
        """Σe² of model ``m``'s residuals (with the coefficients pass 2 was given)."""
        return float(self.sum_squares[m])

    def sample(self, m: int) -> FloatArray:
        """Model ``m``'s residuals in the random sample (row order of the sample)."""
        return self.sample_residuals[:, m].copy()

    @property
    def sample_is_complete(self) -> bool:
        return self.sample_priority.size == self.n


def _layouts(state: LeastSquaresState, factors: Sequence[SubsetFactor]) -> tuple[ModelLayout, ...]:
    assert state.shift is not None and state.scale is not None
    layouts = []
    for factor in factors:
        columns = tuple(int(c) for c in factor.columns)
        if factor.has_intercept:
            own = (0, *(1 + c for c in columns))
            offset = np.zeros(len(own))
            aux_factor = factor
        else:
            own = tuple(1 + c for c in columns)
            offset = np.array([state.shift[c] * state.scale[c] for c in columns])
            aux_factor = state.subset(columns, True)
        aux = (0, *(1 + int(c) for c in aux_factor.columns))
        layouts.append(ModelLayout(own, offset, factor.R, aux, aux_factor.R, columns))
    return tuple(layouts)


def _working_coefficients(state: LeastSquaresState, factor: SubsetFactor,
                          coefficients: FloatArray) -> FloatArray:
    """Column of ``B`` with ``e = (y − s_y) − Z @ column`` for ``Z = [1 | (X − s)·c]``."""
    assert state.shift is not None and state.scale is not None
    column = np.zeros(state.n_columns + 1)
    b = np.asarray(coefficients, dtype=np.float64)
    slopes = b[1:] if factor.has_intercept else b
    indices = list(factor.columns)
    column[0] = (b[0] if factor.has_intercept else 0.0) + float(
        np.dot(slopes, state.shift[indices])) - state.shift[-1]
    column[[1 + j for j in indices]] = slopes / state.scale[indices]
    return column


def _state_means(state: LeastSquaresState) -> FloatArray:
    """Means of the working columns ``[1 | Xs | ys]`` from the factor's first row."""
    R = state.square_factor()
    return R[0] / R[0, 0]


def _merge_moments(n_a: int, mean_a: FloatArray, m2a: FloatArray, m3a: FloatArray,
                   m4a: FloatArray, n_b: int, mean_b: FloatArray, m2b: FloatArray,
                   m3b: FloatArray, m4b: FloatArray) -> tuple[FloatArray, ...]:
    """Pairwise update of central power sums (Pébay 2008, eqs. 3.1)."""
    if n_a == 0:
        return mean_b, m2b, m3b, m4b
    n = n_a + n_b
    delta = mean_b - mean_a
    ratio = delta / n
    mean = mean_a + n_b * ratio
    m2 = m2a + m2b + delta * ratio * n_a * n_b
    m3 = (m3a + m3b + ratio**2 * delta * n_a * n_b * (n_a - n_b)
          + 3.0 * ratio * (n_a * m2b - n_b * m2a))
    m4 = (m4a + m4b + ratio**3 * delta * n_a * n_b * (n_a * n_a - n_a * n_b + n_b * n_b)
          + 6.0 * ratio**2 * (n_a * n_a * m2b + n_b * n_b * m2a)
          + 4.0 * ratio * (n_a * m3b - n_b * m3a))
    return mean, m2, m3, m4


def _is_non_decreasing(values: np.ndarray) -> int:
    """Index of the first value smaller than its predecessor, or -1."""
    if values.size < 2:
        return -1
    try:
        bad = values[1:] < values[:-1]
    except TypeError:
        return 0
    bad = np.asarray(bad, dtype=bool)
    return int(np.argmax(bad)) + 1 if bad.any() else -1


def _time_values(chunk: Mapping[str, np.ndarray], column: str) -> np.ndarray:
    values = np.asarray(chunk[column])
    if values.dtype == object:
        try:
            converted = np.asarray(values.tolist(), dtype="datetime64[ns]")
            return converted
        except (TypeError, ValueError):
            return values
    return values


def residual_pass(
    chunks: Iterable[Mapping[str, np.ndarray]],
    design: Design,
    state: LeastSquaresState,
    factors: Sequence[SubsetFactor],
    coefficients: Sequence[FloatArray] | None = None,
    *,
    time_column: str | None = None,
    key_column: str | None = None,
    in_time_order: bool = True,
    baseline: BaselineSnapshot | None = None,
    break_value: Any = None,
    options: CheckOptions | None = None,
) -> PassTwoResult:
    """Read the chunks once more and accumulate every model's check sums.

    Parameters
    ----------
    chunks
        A fresh iterator of the same chunks pass 1 read (mappings of column name to
        1-D array), including ``time_column`` / ``key_column`` when given.
    design, state, factors
        The design and least-squares state of pass 1 and each model's factor
        (:func:`monitor.stats.fitting.derive_factor`).
    coefficients
        Coefficients (original units, intercept first) to compute residuals with;
        the factors' own by default.
    time_column
        Column whose order the rows follow; needed by the order-dependent checks
        and by ``break_value``.
    key_column
        Column naming rows in the influence report (defaults to ``time_column``,
        then to the row number).
    in_time_order
        Whether the source delivers rows in time order.  Order is also verified on
        ``time_column`` as the rows pass.
    baseline
        A baseline snapshot of the same family: adds the frozen-model sums.
    break_value
        A value of ``time_column``: rows before it and the rest are fitted apart
        for the Chow test.
    """
    options = options or CheckOptions()
    assert state.shift is not None and state.scale is not None
    M = len(factors)
    q = state.n_columns
    n_total = state.n
    if coefficients is None:
        coefficients = [f.coefficients for f in factors]
    coefficients = tuple(np.asarray(b, dtype=np.float64) for b in coefficients)
    layouts = _layouts(state, factors)
    result = PassTwoResult(design, state, tuple(factors), coefficients, layouts, options)
    key_column = key_column or time_column
    B = np.column_stack([_working_coefficients(state, f, b)
                         for f, b in zip(factors, coefficients, strict=True)])
    means = _state_means(state)
    y_scale = state.scale[-1]
    # the residual mean implied by pass 1 (exact up to rounding): centre of the grid / Levene
    result.residual_centre = means[-1] / y_scale - means[:-1] @ B
    sigma2 = np.array([f.ssr / max(n_total - f.n_parameters, 1) for f in factors])
    sigma = np.sqrt(sigma2)
    result.influence_sigma2 = sigma2
    result.u_shift = np.array([f.ssr / n_total for f in factors])
    # RESET standardisation: centre only when the model has an intercept (span unchanged)
    y_mean = state.shift[-1] + means[-1] / y_scale
    result.reset_shift = np.array([y_mean if f.has_intercept else 0.0 for f in factors])
    result.reset_scale = np.array([
        math.sqrt(f.explained / n_total) if f.explained > 0 else 0.0 for f in factors])
    zeros_m = np.zeros(M)
    result.mean, result.m2, result.m3, result.m4 = (zeros_m.copy() for _ in range(4))
    result.sum_squares = zeros_m.copy()
    result.ze = np.zeros((q + 1, M))
    result.zu = np.zeros((q + 1, M))
    result.sum_u2 = zeros_m.copy()
    result.zf = np.zeros((q + 1, 2, M))
    result.ff = np.zeros((3, M))
    result.fe = np.zeros((2, M))
    result.levene_sum = zeros_m.copy()
    result.levene_sum2 = zeros_m.copy()
    result.column_min = np.full(q, np.inf)
    result.column_max = np.full(q, -np.inf)
    result.max_leverage = zeros_m.copy()
    # White: the union of the columns of models whose own auxiliary design is small enough
    eligible = set()
    for layout in layouts:
        k = len(layout.union_columns)
        if 1 + k + k * (k + 1) // 2 <= options.white_max_columns:
            eligible.update(layout.union_columns)
    white_columns = tuple(sorted(eligible))
    width = 1 + len(white_columns) + len(white_columns) * (len(white_columns) + 1) // 2
    if white_columns and width <= options.white_max_columns:
        result.white_columns = white_columns
        result.white_pairs = tuple((a, b) for i, a in enumerate(white_columns)
                                   for b in white_columns[i:])
        result.white_zz = np.zeros((width, width))
        result.white_zu = np.zeros((width, M))
        # Centre and scale every auxiliary column with its exact mean and SD from the pass-1
        # factor (R'R = Z'Z; its rows below the first hold the centred cross-products), and
        # centre each product by its exact mean (a correlation), so the accumulated
        # cross-products are covariances: no cancellation, whatever the chunking.
        R_state = state.square_factor()
        chosen = [1 + c for c in white_columns]
        centred = R_state[1:, chosen].T @ R_state[1:, chosen] / n_total
        spread = np.sqrt(np.clip(np.diag(centred), 0.0, None))
        spread = np.where(spread > 0, spread, 1.0)
        correlation = centred / np.outer(spread, spread)
        where = {c: i for i, c in enumerate(white_columns)}
        result.white_centre = means[chosen]
        result.white_spread = spread
        result.white_product_centre = np.array(
            [correlation[where[a], where[b]] for a, b in result.white_pairs])
    elif white_columns:
        result.white_skip = (f"the family's second-order design would have {width} columns "
                             f"(limit {options.white_max_columns})")
    white_rows = [1 + c for c in result.white_columns]
    white_position = {c: i for i, c in enumerate(result.white_columns)}
    white_a = [1 + white_position[a] for a, _ in result.white_pairs]
    white_b = [1 + white_position[b] for _, b in result.white_pairs]
    # influence
    k_top = options.top_rows
    result.top = {name: [TopRows(k_top) for _ in range(M)]
                  for name in ("studentized", "cooks", "leverage", "dffits")}
    count_names = ("leverage_2p", "leverage_3p", "cooks_4n", "cooks_median", "cooks_1",
                   "dffits", "bonferroni")
    result.influence_counts = {name: np.zeros(M) for name in count_names}
    p_all = np.array([f.n_parameters for f in factors], dtype=float)
    df_ext = n_total - p_all - 1
    cut = {
        "leverage_2p": 2 * p_all / n_total,
        "leverage_3p": 3 * p_all / n_total,
        "cooks_4n": np.full(M, 4.0 / n_total),
        "cooks_median": np.array([stats.f.ppf(0.5, p, max(n_total - p, 1)) for p in p_all]),
        "cooks_1": np.ones(M),
        "dffits": 2 * np.sqrt(p_all / n_total),
        "bonferroni": np.array([stats.t.isf(0.05 / (2 * n_total), d) if d > 0 else np.inf
                                for d in df_ext]),
    }
    inverse_triangular = [solve_triangular(layout.R, np.eye(layout.R.shape[0]), lower=False)
                 if layout.R.size else np.zeros((0, 0)) for layout in layouts]
    influence = _influence_layout(layouts, inverse_triangular, df_ext, p_all, sigma2, n_total,
                                  cut, q)
    # time order and lags
    result.ordered = bool(in_time_order and time_column is not None)
    if time_column is None:
        result.order_reason = "no time column was given, so the rows have no known order"
    elif not in_time_order:
        result.order_reason = "the source does not deliver the rows in time order"
    lags = options.lags if options.lags is not None else min(10, n_total // 5)
    lags = max(int(lags), 0)
    result.lags = lags
    result.lag_sums = np.zeros((lags + 1, M))
    result.z_lagged = np.zeros((q + 1, lags, M))
    result.carry = np.zeros((lags, M))
    result.head = np.zeros((lags, M))
    result.dw_numerator = zeros_m.copy()
    result.dz_dz = np.zeros((q + 1, q + 1))
    result.az_az = np.zeros((q + 1, q + 1))
    result.cusum_sum = zeros_m.copy()
    result.cusum_max = np.full(M, -1.0)
    result.cusum_argmax = np.zeros(M, dtype=np.int64)
    result.cusum_argmax_key = [None] * M
    result.change_stat = np.full(M, -1.0)
    result.change_index = np.zeros(M, dtype=np.int64)
    result.change_key = [None] * M
    result.change_partial = zeros_m.copy()
    stride = max(1, math.ceil(n_total / max(options.path_points, 1)))
    last_e: FloatArray | None = None
    last_z: FloatArray | None = None
    last_delta: FloatArray | None = None
    # Chow at a break value
    if break_value is not None:
        result.break_value = break_value
        if time_column is not None:
            result.state_before = LeastSquaresState(q, shift=state.shift, scale=state.scale)
            result.state_after = LeastSquaresState(q, shift=state.shift, scale=state.scale)
    # sample
    generator = np.random.default_rng(options.seed)
    capacity = max(int(options.sample_size), 0)
    result.sample_residuals = np.zeros((0, M))
    result.sample_design = np.zeros((0, q))
    result.sample_fitted = np.zeros((0, M))
    # fine grid of residuals around the pass-1 mean, ±8 SD
    G = options.grid_bins
    safe_sigma = np.where(sigma > 0, sigma, 1.0)
    result.grid_low = result.residual_centre - 8.0 * safe_sigma
    result.grid_width = 16.0 * safe_sigma / G
    result.grid_counts = np.zeros((M, G + 2), dtype=np.int64)
    # baseline (frozen coefficients)
    frozen_B = None
    baseline_parts = None
    if baseline is not None:
        baseline_parts = baseline.pass_parts(design)
        frozen_B = np.column_stack([
            _working_coefficients(state, f, np.asarray(mb.coefficients))
            for f, mb in zip(factors, baseline.models, strict=True)])
        result.baseline = baseline
        result.frozen_mean = zeros_m.copy()
        result.frozen_m2 = zeros_m.copy()
        result.frozen_sum_squares = zeros_m.copy()
        result.frozen_centre = means[-1] / y_scale - means[:-1] @ frozen_B
        result.frozen_levene_sum = zeros_m.copy()
        result.frozen_levene_sum2 = zeros_m.copy()
        result.frozen_bins = [np.zeros(len(mb.residual_edges) + 1, dtype=np.int64)
                              for mb in baseline.models]
        result.covered = np.zeros(M, dtype=np.int64)
        result.baseline_leverage_sum = zeros_m.copy()
        result.beyond_leverage = np.zeros(M, dtype=np.int64)
        result.outside_range = np.zeros(M, dtype=np.int64)
        result.outside_either = np.zeros(M, dtype=np.int64)
        result.regressor_bins = [np.zeros(len(r.edges) + 1, dtype=np.int64)
                                 for r in baseline.regressors]
        result.sample_frozen = np.zeros((0, M))
    B_all = B if frozen_B is None else np.hstack([B, frozen_B])
    result.gradients = [GradientSums(f.n_parameters) for f in factors] if options.refine else []
    refine_models = [(f.columns, f.has_intercept) for f in factors]
    refine_targets = [g if f.n_parameters else None
                      for f, g in zip(factors, result.gradients, strict=False)]
    buffer: FloatArray | None = None
    rows_before = 0

    for chunk in chunks:
        encoded = design.encode(chunk)
        chunk_rows = len(encoded.usable)
        m = len(encoded.y)
        if m == 0:
            rows_before += chunk_rows
            result.rows_read += chunk_rows
            continue
        row_numbers = rows_before + np.flatnonzero(encoded.usable)
        rows_before += chunk_rows
        result.rows_read += chunk_rows
        result.chunks += 1
        X, y = encoded.X, encoded.y
        if buffer is None or buffer.shape[0] < m:
            buffer = np.empty((m, state.width))
        Zfull = state.working_rows(X, y, out=buffer)
        Z = Zfull[:, :-1]
        y_centred = Zfull[:, -1] / y_scale
        # residuals with models as rows: ``E`` is the (rows x models) view of a column-major
        # array, so the per-model sums below reduce along contiguous memory
        both_rows = B_all.T @ Z.T
        np.subtract(y_centred, both_rows, out=both_rows)
        both = both_rows.T
        E = both[:, :M]
        keys: np.ndarray
        if key_column is not None:
            keys = np.asarray(chunk[key_column])[encoded.usable]
        else:
            keys = row_numbers
        start = result.n
        # ---- moments
        chunk_mean = E.mean(axis=0)
        D = E - chunk_mean
        D2 = D * D
        c2, c3, c4 = D2.sum(axis=0), (D2 * D).sum(axis=0), (D2 * D2).sum(axis=0)
        result.mean, result.m2, result.m3, result.m4 = _merge_moments(
            start, result.mean, result.m2, result.m3, result.m4, m, chunk_mean, c2, c3, c4)
        E2 = E * E
        result.sum_squares += E2.sum(axis=0)
        result.ze += Z.T @ E
        U = E2 - result.u_shift
        result.zu += Z.T @ U
        result.sum_u2 += np.einsum("ij,ij->j", U, U)
        absolute = np.abs(E - result.residual_centre)
        result.levene_sum += absolute.sum(axis=0)
        result.levene_sum2 += np.einsum("ij,ij->j", absolute, absolute)
        np.minimum(result.column_min, X.min(axis=0), out=result.column_min)
        np.maximum(result.column_max, X.max(axis=0), out=result.column_max)
        # ---- White
        if result.white_pairs:
            # auxiliary columns as rows (contiguous products), summed with BLAS
            k = len(white_rows)
            W2 = np.empty((1 + k + len(white_a), m))
            W2[0] = 1.0
            np.subtract(Z.T[white_rows], result.white_centre[:, None], out=W2[1:1 + k])
            W2[1:1 + k] /= result.white_spread[:, None]
            products = W2[1 + k:]
            np.multiply(W2[white_a], W2[white_b], out=products)
            products -= result.white_product_centre[:, None]
            result.white_zz += W2 @ W2.T
            result.white_zu += W2 @ U
        # ---- RESET
        fitted = (y_centred + state.shift[-1])[:, None] - E
        F = (fitted - result.reset_shift) / np.where(result.reset_scale > 0, result.reset_scale, 1)
        F2 = F * F
        F3 = F2 * F
        result.zf[:, 0, :] += Z.T @ F2
        result.zf[:, 1, :] += Z.T @ F3
        result.ff[0] += np.einsum("ij,ij->j", F2, F2)
        result.ff[1] += np.einsum("ij,ij->j", F2, F3)
        result.ff[2] += np.einsum("ij,ij->j", F3, F3)
        result.fe[0] += np.einsum("ij,ij->j", F2, E)
        result.fe[1] += np.einsum("ij,ij->j", F3, E)
        # ---- influence, all models at once
        if influence.index.size:
            _accumulate_influence(result, influence, Z, E, row_numbers, keys)
        # ---- refinement step sums
        if options.refine:
            accumulate_family(X, y, refine_models, coefficients, refine_targets)
        # ---- time order
        if result.ordered and time_column is not None:
            times = _time_values(chunk, time_column)[encoded.usable]
            bad = _is_non_decreasing(times)
            if bad < 0 and result.last_time is not None:
                try:
                    if bool(times[0] < result.last_time):
                        bad = 0
                except TypeError:
                    bad = 0
            if bad >= 0:
                result.ordered = False
                result.order_reason = (f"column {time_column!r} decreases at row "
                                       f"{int(row_numbers[bad])}: the rows are not in time order")
            else:
                if result.first_time is None:
                    result.first_time = times[0]
                result.last_time = times[-1]
        if result.ordered:
            last_delta = _accumulate_ordered(result, E, Z, keys, start, n_total, stride,
                                             last_e, last_z, last_delta)
            last_e = E[-1].copy()
            last_z = Z[-1].copy()
        # ---- Chow segments
        if result.state_before is not None and result.state_after is not None:
            times = _time_values(chunk, time_column)[encoded.usable]  # type: ignore[index]
            before = np.asarray(times < break_value, dtype=bool)
            if before.any():
                result.state_before.absorb(X[before], y[before])
            if (~before).any():
                result.state_after.absorb(X[~before], y[~before])
        # ---- histogram on the fine grid
        index_grid = np.floor((E - result.grid_low) / result.grid_width)
        np.clip(index_grid, -1, G, out=index_grid)
        flat = (index_grid.astype(np.int64) + 1) + np.arange(M) * (G + 2)
        result.grid_counts += np.bincount(flat.ravel(order="K"),
                                          minlength=M * (G + 2)).reshape(M, G + 2)
        # ---- frozen baseline model
        if frozen_B is not None and baseline_parts is not None:
            _accumulate_frozen(result, both[:, M:], X, Z, baseline_parts, start)
        # ---- sample: bottom-k of random priorities
        priority = generator.random(m)
        if capacity:
            _offer_sample(result, capacity, priority, E, X,
                          both[:, M:] if frozen_B is not None else None,
                          keys=np.asarray(keys, dtype=object), fitted=y[:, None] - E)
        result.n += m
    if result.n != n_total:
        raise ValueError(f"pass 2 saw {result.n} usable rows but pass 1 saw {n_total}; the "
                         "chunks must be the same rows in both passes")
    if result.ordered and last_delta is not None:
        result.az_az += np.outer(last_delta, last_delta)
    _finish_refinement(result)
    return result


@dataclass(frozen=True, slots=True)
class _Influence:
    """What the per-row influence measures of pass 2 need, arranged for all models at once.

    ``index``: the models with influence measures (``p > 0`` and a positive external df);
    ``combined``: positions (into ``index``) of the models whose leverages come from one
    product ``Gᵀ Zᵀ`` (``G`` holds each such model's ``R⁻¹`` in its own rows and its own
    block of columns; ``block_sum`` adds up the squares of each block); ``separate``:
    positions of the models without intercept, whose uncentred working design
    ``Z[:, own] + offset`` is formed apart (adding the offset after the product would
    cancel digits when the data sit far from their mean).
    """

    index: np.ndarray
    combined: np.ndarray
    G: FloatArray
    block_sum: FloatArray
    separate: tuple[int, ...]
    separate_inverse: dict[int, FloatArray]
    scaled_ssr: FloatArray      # (n − p)·σ̂²
    df_ext: FloatArray
    p_sigma2: FloatArray        # p·σ̂²
    cut: dict[str, FloatArray]


def _influence_layout(layouts: Sequence[ModelLayout], inverse_triangular: Sequence[FloatArray],
                      df_ext: FloatArray, p_all: FloatArray, sigma2: FloatArray, n_total: int,
                      cut: Mapping[str, FloatArray], q: int) -> _Influence:
    index = np.array([i for i, layout in enumerate(layouts)
                      if layout.R.shape[0] > 0 and df_ext[i] > 0], dtype=np.int64)
    combined = [pos for pos, i in enumerate(index) if not layouts[i].own_offset.any()]
    separate = tuple(pos for pos, i in enumerate(index) if layouts[i].own_offset.any())
    width = sum(layouts[index[pos]].R.shape[0] for pos in combined)
    G = np.zeros((q + 1, width))
    block_sum = np.zeros((len(combined), width))
    column = 0
    for row, pos in enumerate(combined):
        i = index[pos]
        p = layouts[i].R.shape[0]
        G[list(layouts[i].own), column:column + p] = inverse_triangular[i]
        block_sum[row, column:column + p] = 1.0
        column += p
    return _Influence(
        index=index, combined=np.array(combined, dtype=np.int64), G=G,
        block_sum=block_sum, separate=separate,
        separate_inverse={pos: inverse_triangular[index[pos]] for pos in separate},
        scaled_ssr=(n_total - p_all[index]) * sigma2[index], df_ext=df_ext[index],
        p_sigma2=p_all[index] * sigma2[index],
        cut={name: np.asarray(values)[index] for name, values in cut.items()})


def _accumulate_influence(result: PassTwoResult, influence: _Influence, Z: FloatArray,
                          E: FloatArray, row_numbers: np.ndarray, keys: np.ndarray) -> None:
    """Leverage, externally studentized residuals, Cook's distance and DFFITS of one chunk.

    Kept only as counts above the cut-offs and the top rows of each measure.
    """
    # rows of the arrays below are models, so every reduction runs along contiguous memory
    index = influence.index
    m = Z.shape[0]
    h = np.empty((index.size, m))
    if influence.combined.size:
        H = influence.G.T @ Z.T
        np.multiply(H, H, out=H)
        h[influence.combined] = influence.block_sum @ H
    for pos in influence.separate:
        layout = result.layouts[index[pos]]
        W = Z[:, list(layout.own)] + layout.own_offset
        Hm = W @ influence.separate_inverse[pos]
        h[pos] = np.einsum("ij,ij->i", Hm, Hm)
    e = np.ascontiguousarray(E.T[index])
    result.max_leverage[index] = np.maximum(result.max_leverage[index], h.max(axis=1))
    one_minus = 1.0 - h
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        e2 = e * e
        s2_i = (influence.scaled_ssr[:, None] - e2 / one_minus) / influence.df_ext[:, None]
        s2_i *= one_minus
        np.sqrt(s2_i, out=s2_i)
        t_ext = e / s2_i
        cooks = e2 * h
        cooks /= influence.p_sigma2[:, None] * one_minus**2
        ratio = h / one_minus
        np.sqrt(ratio, out=ratio)
        dffits = np.multiply(t_ext, ratio, out=ratio)
    # a non-finite measure (a row with leverage 1) counts as 0, as before
    t_abs = np.nan_to_num(np.abs(t_ext, out=t_ext), nan=0.0, posinf=0.0, copy=False)
    cooks = np.nan_to_num(cooks, nan=0.0, posinf=0.0, neginf=0.0, copy=False)
    dffits_abs = np.nan_to_num(np.abs(dffits, out=dffits), nan=0.0, posinf=0.0, copy=False)
    cut = influence.cut
    counts = result.influence_counts
    for name, values in (("leverage_2p", h), ("leverage_3p", h), ("cooks_4n", cooks),
                         ("cooks_median", cooks), ("cooks_1", cooks), ("dffits", dffits_abs),
                         ("bonferroni", t_abs)):
        counts[name][index] += np.count_nonzero(values > cut[name][:, None], axis=1)
    for name, values in (("studentized", t_abs), ("cooks", cooks), ("leverage", h),
                         ("dffits", dffits_abs)):
        largest = values.max(axis=1)
        tops = result.top[name]
        for pos, model in enumerate(index):
            top = tops[model]
            # nothing in this chunk beats the smallest value kept: no merge
            if top.values.size >= top.capacity and largest[pos] <= top.values.min():
                continue
            top.offer(values[pos], row_numbers, keys, e[pos], h[pos])

def _accumulate_ordered(result: PassTwoResult, E: FloatArray, Z: FloatArray, keys: np.ndarray,
                        start: int, n_total: int, stride: int, last_e: FloatArray | None,
                        last_z: FloatArray | None, last_delta: FloatArray | None) -> FloatArray:
    """Lag sums, Durbin–Watson sums, design differences and the CUSUM path of one chunk.

    Returns the last first-difference row of the design (carried to the next chunk).
    """
    m, M = E.shape
    L = result.lags
    if L:
        ext = np.empty((L + m, M), order="F")  # the layout of E: contiguous per model
        ext[:L] = result.carry
        ext[L:] = E
        for k in range(1, L + 1):
            lagged = ext[L - k: L - k + m]        # a view: e_{t-k} beside row t
            result.lag_sums[k] += np.einsum("ij,ij->j", E, lagged)
            result.z_lagged[:, k - 1, :] += Z.T @ lagged
        if start < L:
            take = min(L - start, m)
            result.head[start:start + take] = E[:take]
        result.carry = ext[-L:].copy()
    result.lag_sums[0] += np.einsum("ij,ij->j", E, E)
    if last_e is None:
        difference = E[1:] - E[:-1]
    else:
        difference = np.empty((m, M), order="F")
        np.subtract(E[1:], E[:-1], out=difference[1:])
        np.subtract(E[0], last_e, out=difference[0])
    result.dw_numerator += np.einsum("ij,ij->j", difference, difference)
    # first differences of the design (Δ_1 = 0) and the second differences A z
    # (one buffer: the previous chunk's last difference, then this chunk's)
    sequence = np.empty((m + 1, Z.shape[1]))
    delta = sequence[1:]
    np.subtract(Z[1:], Z[:-1], out=delta[1:])
    if last_z is None:
        delta[0] = 0.0
        sequence = delta
    else:
        np.subtract(Z[0], last_z, out=delta[0])
        sequence[0] = last_delta
    result.dz_dz += delta.T @ delta
    second = sequence[:-1] - sequence[1:]
    result.az_az += second.T @ second
    last = delta[-1].copy()
    # OLS CUSUM: running sums, largest excursion, the mean-change statistic, thinned path
    partial = result.cusum_sum + np.cumsum(E, axis=0)
    result.cusum_sum = partial[-1].copy()
    absolute = np.abs(partial)
    where = np.argmax(absolute, axis=0)
    t = start + 1 + np.arange(m)
    with np.errstate(divide="ignore", invalid="ignore"):
        weight = np.where(t < n_total, np.sqrt(n_total / (t * (n_total - t))), 0.0)
    weighted = absolute * weight[:, None]
    where_w = np.argmax(weighted, axis=0)
    for index in range(M):
        value = absolute[where[index], index]
        if value > result.cusum_max[index]:
            result.cusum_max[index] = value
            result.cusum_argmax[index] = start + where[index]
            result.cusum_argmax_key[index] = keys[where[index]]
        value_w = weighted[where_w[index], index]
        if value_w > result.change_stat[index]:
            result.change_stat[index] = value_w
            result.change_index[index] = start + where_w[index]
            result.change_key[index] = keys[where_w[index]]
            result.change_partial[index] = partial[where_w[index], index]
    keep = (t % stride == 0) | (t == n_total)
    if keep.any():
        result.path_index.append(t[keep] - 1)
        result.path_values.append(partial[keep])
        result.path_keys.append(np.asarray(keys)[keep])
    return last


def _accumulate_frozen(result: PassTwoResult, F: FloatArray, X: FloatArray, Z: FloatArray,
                       parts: Any, start: int) -> None:
    """Sums of the frozen baseline model's forecast errors on the fresh rows."""
    m, M = F.shape
    chunk_mean = F.mean(axis=0)
    D = F - chunk_mean
    c2 = np.einsum("ij,ij->j", D, D)
    if start == 0:
        result.frozen_mean, result.frozen_m2 = chunk_mean, c2
    else:
        n = start + m
        delta = chunk_mean - result.frozen_mean
        result.frozen_mean = result.frozen_mean + delta * m / n
        result.frozen_m2 = result.frozen_m2 + c2 + delta**2 * start * m / n
    result.frozen_sum_squares += np.einsum("ij,ij->j", F, F)
    absolute = np.abs(F - result.frozen_centre)
    result.frozen_levene_sum += absolute.sum(axis=0)
    result.frozen_levene_sum2 += np.einsum("ij,ij->j", absolute, absolute)
    below = X < parts.column_min
    above = X > parts.column_max
    outside = below | above
    Zb = np.empty((m, X.shape[1] + 1))
    Zb[:, 0] = 1.0
    np.subtract(X, parts.shift, out=Zb[:, 1:])
    Zb[:, 1:] *= parts.scale
    for index in range(M):
        edges = parts.residual_edges[index]
        result.frozen_bins[index] += np.bincount(
            np.searchsorted(edges, F[:, index], side="right"), minlength=len(edges) + 1)
        W = Zb[:, list(parts.own[index])]
        if parts.own_offset[index].any():
            W = W + parts.own_offset[index]
        H = W @ parts.inverse_triangular[index]
        h0 = np.einsum("ij,ij->i", H, H)
        result.baseline_leverage_sum[index] += h0.sum()
        half_width = parts.t_critical[index] * parts.sigma[index] * np.sqrt(1.0 + h0)
        result.covered[index] += np.count_nonzero(np.abs(F[:, index]) <= half_width)
        beyond = h0 > parts.max_leverage[index]
        result.beyond_leverage[index] += np.count_nonzero(beyond)
        columns = list(parts.union_columns[index])
        out_any = outside[:, columns].any(axis=1) if columns else np.zeros(m, dtype=bool)
        result.outside_range[index] += np.count_nonzero(out_any)
        result.outside_either[index] += np.count_nonzero(out_any | beyond)
    for j, edges in enumerate(parts.regressor_edges):
        result.regressor_bins[j] += np.bincount(
            np.searchsorted(edges, X[:, j], side="right"), minlength=len(edges) + 1)


def _offer_sample(result: PassTwoResult, capacity: int, priority: FloatArray, E: FloatArray,
                  X: FloatArray, frozen: FloatArray | None, *, keys: np.ndarray,
                  fitted: FloatArray) -> None:
    """Keep the rows with the ``capacity`` smallest random priorities (with their keys)."""
    current = result.sample_priority
    if current.size >= capacity:
        keep = priority < current.max()
        if not keep.any():
            return
        priority, E, X, keys, fitted = priority[keep], E[keep], X[keep], keys[keep], fitted[keep]
        frozen = None if frozen is None else frozen[keep]
    all_priority = np.concatenate([current, priority])
    all_E = np.vstack([result.sample_residuals, E])
    all_X = np.vstack([result.sample_design, X])
    all_keys = np.concatenate([result.sample_keys, keys])
    all_fitted = np.vstack([result.sample_fitted, fitted])
    all_F = None if frozen is None else np.vstack([result.sample_frozen, frozen])
    if all_priority.size > capacity:
        pick = np.argpartition(all_priority, capacity - 1)[:capacity]
        pick.sort()
        all_priority, all_E, all_X = all_priority[pick], all_E[pick], all_X[pick]
        all_keys, all_fitted = all_keys[pick], all_fitted[pick]
        all_F = None if all_F is None else all_F[pick]
    result.sample_priority, result.sample_residuals, result.sample_design = (
        all_priority, all_E, all_X)
    result.sample_keys, result.sample_fitted = all_keys, all_fitted
    if all_F is not None:
        result.sample_frozen = all_F


def _finish_refinement(result: PassTwoResult) -> None:
    refined, ssr, steps = [], [], []
    for index, factor in enumerate(result.factors):
        b = result.coefficients[index]
        if not result.gradients or factor.n_parameters == 0:
            refined.append(b.copy())
            ssr.append(float(result.sum_squares[index]))
            steps.append(0.0)
            continue
        sums = result.gradients[index]
        gradient = sums.gradient
        step = correction(factor, gradient)
        scale = np.maximum(np.abs(b), np.finfo(float).tiny)
        size = float(np.max(np.abs(step) / scale)) if step.size else 0.0
        if np.isfinite(size):
            refined.append(b + step)
            ssr.append(max(sums.ssr - float(step @ gradient), 0.0))
        else:
            refined.append(b.copy())
            ssr.append(sums.ssr)
        steps.append(size)
    result.refined_coefficients = tuple(refined)
    result.refined_ssr = tuple(ssr)
    result.refinement_step = tuple(steps)
