"""Fitting one or many formulas from chunks: pass 1 (the state), derivation, refinement.

The core takes chunks as mappings of column name to 1-D numpy array and never
reads files itself.  ``chunks`` is a *callable* returning a fresh iterator, so
the rows can be read again for the refinement / residual pass.

Row policy for several formulas: the union of every formula's columns is
encoded once, and a row missing (or non-finite, or an unseen level) in any
column of the union is left out for every model.  All candidates are therefore
fitted to the same rows, which keeps their likelihoods and information criteria
comparable; the counts are reported in :class:`ScanTotals`.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from ..errors import DataValidationError, ModelFitError
from .engine import LeastSquaresState, SubsetFactor
from .formula import CategoricalSpec, Design, ParsedFormula, _as_text, _level_order, build_design
from .refine import GradientSums, accumulate_family, correction
from .results import FitResult, make_fit_result

__all__ = [
    "ChunkSource",
    "PassOne",
    "ScanTotals",
    "derive_factor",
    "fit_formulas",
    "pass_one",
    "needs_refinement",
    "predicted_error",
    "refine_factors",
    "result_of",
]

Chunk = Mapping[str, np.ndarray]
ChunkSource = Callable[[], Iterable[Chunk]]

#: A refinement step is accepted while it shrinks by at least this factor.
_CONTRACTION = 0.5
_UNIT_ROUNDOFF = 2.0**-53


@dataclass(slots=True)
class ScanTotals:
    """What one read of the window saw: rows read, rows left out and why."""

    rows_read: int = 0
    rows_used: int = 0
    dropped_rows: int = 0
    dropped_by_column: dict[str, int] = field(default_factory=dict)
    first_bad_row: dict[str, int] = field(default_factory=dict)
    unseen_levels: dict[str, dict[str, int]] = field(default_factory=dict)
    chunks: int = 0

    def add(self, encoded_rows: int, used: int, dropped_by_column: Mapping[str, int],
            first_bad_row: Mapping[str, int], unseen: Mapping[str, Mapping[str, int]]) -> None:
        offset = self.rows_read
        self.rows_read += encoded_rows
        self.rows_used += used
        self.dropped_rows += encoded_rows - used
        self.chunks += 1
        for column, count in dropped_by_column.items():
            self.dropped_by_column[column] = self.dropped_by_column.get(column, 0) + count
        for column, row in first_bad_row.items():
            self.first_bad_row.setdefault(column, offset + row)
        for column, counts in unseen.items():
            target = self.unseen_levels.setdefault(column, {})
            for level, count in counts.items():
                target[level] = target.get(level, 0) + count


@dataclass(slots=True)
class PassOne:
    """The frozen design, the least-squares state over the union, and the totals."""

    design: Design
    state: LeastSquaresState
    totals: ScanTotals


def pass_one(
    chunks: Iterable[Chunk],
    formulas: Sequence[str | ParsedFormula],
    *,
    design: Design | None = None,
    categorical: Mapping[str, CategoricalSpec] | None = None,
    strict: bool = False,
) -> PassOne:
    """Read every chunk once into one least-squares state over the union of columns.

    The design is frozen on the first chunk unless one is given (a later night
    reuses the design of the night that set the baseline).

    Raises
    ------
    DataValidationError
        No rows at all; with ``strict``, any row that would be left out (naming
        the column and the first such row).
    """
    state: LeastSquaresState | None = None
    totals = ScanTotals()
    for chunk in chunks:
        if design is None:
            if not chunk or len(next(iter(chunk.values()))) == 0:
                continue
            design = build_design(formulas, chunk, categorical=categorical)
        if state is None:
            state = LeastSquaresState(len(design.columns))
        encoded = design.encode(chunk)
        if strict and encoded.dropped_rows:
            column = min(encoded.first_bad_row, key=encoded.first_bad_row.__getitem__)
            row = totals.rows_read + encoded.first_bad_row[column]
            reason = ("an unseen level" if column in encoded.unseen_levels
                      else "a missing or non-finite value")
            raise DataValidationError(
                f"column {column!r} has {reason} (first at row {row}; "
                f"{encoded.dropped_by_column[column]} such rows in this chunk)",
                where=f"column {column!r}, row {row}",
                hint="clean the rows upstream, or run without --strict to leave them out and "
                "count them",
            )
        totals.add(len(encoded.usable), len(encoded.y), encoded.dropped_by_column,
                   encoded.first_bad_row, encoded.unseen_levels)
        state.absorb(encoded.X, encoded.y)
    if design is None or state is None:
        raise DataValidationError("the data have no rows", where="input",
                                  hint="check the file or the time window")
    return PassOne(design, state, totals)


def derive_factor(one: PassOne, model: int) -> SubsetFactor:
    """The factor of one model from the union state; too few rows is an error."""
    indices, has_intercept = one.design.models[model]
    n_coefficients = len(indices) + (1 if has_intercept else 0)
    if one.state.n <= n_coefficients:
        formula = one.design.formulas[model].text
        raise ModelFitError(
            f"{one.state.n} usable rows for {n_coefficients} coefficients; the fit needs at "
            f"least {n_coefficients + 1} (one more than its coefficients)",
            where=f"formula {formula!r}",
            hint=f"widen the window or use a smaller model ({one.totals.dropped_rows} rows "
            "were left out for missing or unusable values)",
        )
    return one.state.subset(indices, has_intercept)


def predicted_error(factor: SubsetFactor) -> float:
    """A first-order estimate of the relative error the unrefined QR fit can carry.

    The largest of: ``u·(κ + κ²·ρ)`` for the working coefficients (κ the condition
    number of the working factor, ρ = ‖r‖/(‖R‖·‖w‖), Björck 1996 §1.4 and §2.4),
    amplified by the cancellation in mapping them back to original units (an
    intercept far from the data's centre); and ``u·TSS/SSR`` for the residual sum
    of squares taken from the factor (a fit with R² near 1).
    """
    p = factor.n_parameters
    if p == 0:
        return 0.0
    singular = np.linalg.svd(factor.R, compute_uv=False)
    if singular[-1] <= 0.0 or not np.all(np.isfinite(singular)):
        return np.inf
    kappa = float(singular[0] / singular[-1])
    working = np.linalg.solve(factor.R, factor.qty) if p else np.zeros(0)
    size = float(np.max(np.abs(working)))
    residual = np.sqrt(factor.ssr) * factor.response_scale
    rho = residual / (float(singular[0]) * size) if size > 0 else np.inf
    with np.errstate(divide="ignore", invalid="ignore"):
        amplification = np.max(np.abs(factor.transform).sum(axis=1) * size /
                               np.abs(factor.coefficients))
        total = factor.ssr + factor.explained
        ssr_part = total / factor.ssr if factor.ssr > 0 else np.inf
    coefficient_part = (kappa + kappa**2 * rho) * float(amplification)
    estimate = _UNIT_ROUNDOFF * max(coefficient_part, float(ssr_part))
    return estimate if np.isfinite(estimate) else np.inf


#: Refine a model only when its unrefined fit may be off by more than this
#: (relative): about 100 units of round-off, i.e. the last two digits of a double.
REFINE_ABOVE = 1e-14


def needs_refinement(factor: SubsetFactor) -> bool:
    """Whether the refinement read can change the fit beyond the last digits of a double."""
    return predicted_error(factor) > REFINE_ABOVE


def refine_factors(
    chunks: ChunkSource,
    design: Design,
    factors: Sequence[SubsetFactor],
    *,
    max_passes: int = 3,
) -> tuple[list[np.ndarray], list[float], list[int]]:
    """Refine every model's coefficients with accurate residuals, reading the rows again.

    Returns refined coefficients, residual sums of squares (of the last residuals
    computed, corrected by the final step) and the number of accepted steps per
    model.  Stops early once every model's step is below the unit round-off or
    stops shrinking.
    """
    coefficients = [f.coefficients.copy() for f in factors]
    ssr = [f.ssr for f in factors]
    accepted = [0] * len(factors)
    previous = [np.inf] * len(factors)
    active = [f.n_parameters > 0 for f in factors]
    contraction = [min(predicted_error(f), 1.0) for f in factors]
    for _ in range(max_passes):
        if not any(active):
            break
        sums = [GradientSums(f.n_parameters) for f in factors]
        models = [(f.columns, f.has_intercept) for f in factors]
        for chunk in chunks():
            encoded = design.encode(chunk)
            if len(encoded.y) == 0:
                continue
            accumulate_family(encoded.X, encoded.y, models, coefficients,
                              [sums[m] if active[m] else None for m in range(len(factors))])
        for m, factor in enumerate(factors):
            if not active[m]:
                continue
            gradient = sums[m].gradient
            step = correction(factor, gradient)
            scale = np.maximum(np.abs(coefficients[m]), np.finfo(float).tiny)
            size = float(np.max(np.abs(step) / scale)) if step.size else 0.0
            ssr[m] = sums[m].ssr
            if not np.isfinite(size) or size > _CONTRACTION * previous[m]:
                active[m] = False  # not contracting: keep the better estimate
                continue
            coefficients[m] = coefficients[m] + step
            ssr[m] = max(sums[m].ssr - float(step @ gradient), 0.0)
            accepted[m] += 1
            previous[m] = size
            # each step shrinks the error by about the predicted error of the plain
            # fit; stop once what the next step could still remove is below round-off
            if size <= _UNIT_ROUNDOFF or size * contraction[m] <= _UNIT_ROUNDOFF:
                active[m] = False
    return coefficients, ssr, accepted


def result_of(
    one: PassOne,
    model: int,
    factor: SubsetFactor,
    *,
    coefficients: np.ndarray | None = None,
    ssr: float | None = None,
    refinement_steps: int = 0,
    confidence_level: float = 0.95,
) -> FitResult:
    """The :class:`FitResult` of one model from its factor (and refined values)."""
    design = one.design
    labels = design.labels(model)
    indices, has_intercept = design.models[model]
    estimated_columns = set(factor.columns)
    estimated = ([True] if has_intercept else []) + [j in estimated_columns for j in indices]
    return make_fit_result(
        formula=design.formulas[model].text,
        labels=labels,
        estimated=estimated,
        has_intercept=has_intercept,
        n=factor.n,
        coefficients=factor.coefficients if coefficients is None else coefficients,
        unscaled_covariance=factor.unscaled_covariance(),
        ss_resid=factor.ssr if ssr is None else ssr,
        ss_model=factor.explained,
        dropped_rows=one.totals.dropped_rows,
        unseen_levels=one.totals.unseen_levels,
        refinement_steps=refinement_steps,
        confidence_level=confidence_level,
    )


def _design_over_all_chunks(
    chunks: ChunkSource,
    formulas: Sequence[str | ParsedFormula],
    categorical: Mapping[str, CategoricalSpec] | None,
) -> Design | None:
    """The design with every categorical level seen in any chunk (None: no rows)."""
    declared = dict(categorical or {})
    design: Design | None = None
    first: Chunk = {}
    seen: dict[str, set[str]] = {}
    for chunk in chunks():
        if not chunk or len(next(iter(chunk.values()))) == 0:
            continue
        if design is None:
            first = chunk
            design = build_design(formulas, chunk, categorical=categorical)
            open_columns = [c for c in design.categorical_columns
                            if declared.get(c, CategoricalSpec()).levels is None]
            if not open_columns:
                return design
            seen = {c: set() for c in open_columns}
        for column, levels in seen.items():
            text, missing = _as_text(chunk[column])
            levels.update(str(v) for v in text[~missing])
    if design is None:
        return None
    for column, levels in seen.items():
        spec = declared.get(column, CategoricalSpec())
        declared[column] = CategoricalSpec(levels=tuple(sorted(levels, key=_level_order)),
                                           reference=spec.reference)
    return build_design(formulas, first, categorical=declared)


def fit_formulas(
    chunks: ChunkSource,
    formulas: Sequence[str | ParsedFormula],
    *,
    categorical: Mapping[str, CategoricalSpec] | None = None,
    strict: bool = False,
    refinement_passes: int = 3,
) -> tuple[PassOne, list[FitResult]]:
    """Fit every formula on the same rows: one pass for the state, then refinement passes.

    Levels of categorical columns that are not declared are collected over every
    chunk first (an extra read of the rows, only when there are such columns), so
    a level missing from the first chunk is still a level of the fit.
    """
    design = _design_over_all_chunks(chunks, formulas, categorical)
    one = pass_one(chunks(), formulas, design=design, categorical=categorical, strict=strict)
    factors = [derive_factor(one, m) for m in range(len(one.design.models))]
    coefficients = [f.coefficients for f in factors]
    ssr = [f.ssr for f in factors]
    steps = [0] * len(factors)
    needing = [m for m, f in enumerate(factors) if refinement_passes > 0 and needs_refinement(f)]
    if needing:
        refined = refine_factors(chunks, one.design, [factors[m] for m in needing],
                                 max_passes=refinement_passes)
        for position, m in enumerate(needing):
            coefficients[m] = refined[0][position]
            ssr[m] = refined[1][position]
            steps[m] = refined[2][position]
    results = [
        result_of(one, m, factors[m], coefficients=coefficients[m], ssr=ssr[m],
                  refinement_steps=steps[m])
        for m in range(len(factors))
    ]
    return one, results
