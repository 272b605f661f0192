"""A night's evaluation of a family: exactly two reads of the window.

Read 1 (:func:`monitor.stats.family.prepare_candidates`) builds the one
least-squares state and every candidate's factor; read 2
(:func:`monitor.stats.residual_pass.residual_pass`) computes every candidate's
residuals at once, refines their coefficients with accurately computed
residuals, and accumulates what the assumption checks (and, with a baseline,
the drift checks) need.  The fits, the ranking, the nested tests, the verdict
and the checks then come from those two reads.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

from ..errors import ConfigurationError
from .changepoint import estimate_change
from .checks import CheckResult, run_checks
from .drift import BaselineSnapshot, build_snapshot
from .family import FamilyReport, FamilySpec, compare_fits, family_rows, prepare_candidates
from .fitting import ChunkSource, result_of
from .formula import CategoricalSpec
from .residual_pass import CheckOptions, PassTwoResult, residual_pass

__all__ = ["NightlyEvaluation", "baseline_fits_family", "evaluate_night"]


@dataclass(frozen=True, slots=True)
class NightlyEvaluation:
    """The family report (with every candidate's checks), pass 2, and change estimates."""

    report: FamilyReport
    pass_two: PassTwoResult
    changes: Mapping[str, Any]

    def sample_view(self, name: str, *, limit: int = 400) -> dict[str, Any]:
        """A bounded, time-ordered sample of one candidate's rows for the report's views.

        ``sample``: key (the time, or the key column), fitted value and residual of up to
        ``limit`` rows drawn by pass 2's seeded reservoir; ``forecast_errors``: the frozen
        baseline model's errors on the same rows (absent without a baseline).
        """
        two = self.pass_two
        m = self.report.family.names.index(name)
        keys = two.sample_keys
        if keys.size == 0:
            return {}
        order = np.argsort(keys, kind="stable")
        if order.size > limit:
            order = np.sort(order[np.linspace(0, order.size - 1, limit).astype(int)])
            order = order[np.argsort(keys[order], kind="stable")]
        at = [_plain_key(k) for k in keys[order]]
        view: dict[str, Any] = {"sample": {
            "at": at, "key": at,
            "fitted": [float(v) for v in two.sample_fitted[order, m]],
            "residual": [float(v) for v in two.sample_residuals[order, m]]}}
        if two.sample_frozen.size and two.sample_frozen.shape[0] == keys.size:
            view["forecast_errors"] = {"at": at,
                                       "error": [float(v) for v in two.sample_frozen[order, m]]}
        return view

    def snapshot(self, *, window_start: str | None = None,
                 window_end: str | None = None) -> BaselineSnapshot:
        """This window summarised as a baseline for later nights."""
        return build_snapshot(self.pass_two, window_start=window_start, window_end=window_end)


def _plain_key(value: Any) -> Any:
    """A row key as JSON-ready text or number (instants as ISO text, UTC)."""
    if isinstance(value, np.datetime64):
        return str(np.datetime_as_string(value, unit="s", timezone="UTC"))
    if isinstance(value, (np.integer, np.floating)):
        return value.item()
    if hasattr(value, "isoformat"):
        return value.isoformat()
    return value if isinstance(value, (int, float, str)) else str(value)


def baseline_fits_family(baseline: BaselineSnapshot, spec: FamilySpec) -> bool:
    """Whether a stored baseline was made for exactly this family's formulas."""
    return tuple(baseline.formulas) == tuple(spec.formulas)


def evaluate_night(
    spec: FamilySpec,
    chunks: ChunkSource,
    *,
    baseline: BaselineSnapshot | None = None,
    time_column: str | None = None,
    key_column: str | None = None,
    in_time_order: Callable[[], bool] | bool = True,
    options: CheckOptions | None = None,
    strict: bool = False,
) -> NightlyEvaluation:
    """Evaluate a family and run every candidate's checks, reading the rows twice.

    Parameters
    ----------
    spec
        The family.
    chunks
        A callable returning a fresh iterator of chunks; each chunk carries the
        family's columns and ``time_column`` / ``key_column``.
    baseline
        A stored snapshot of the same family: its categorical levels are reused
        (so tonight's rows are encoded as the baseline's were) and the drift
        checks compare tonight with it.
    in_time_order
        Whether the rows came in time order; a callable is asked after read 1
        (a source knows only then).

    Without a baseline, when a level of an undeclared categorical column was missing
    from the first chunk (read 1 counted it as unseen), the levels are collected over
    the whole window and read 1 is repeated, so such a level is still a level.
    """
    if baseline is not None and not baseline_fits_family(baseline, spec):
        raise ConfigurationError(
            "the stored baseline was made for other candidate formulas",
            where="baseline", hint="promote a model (or clear the baseline) to start a new one")
    options = options or CheckOptions()
    if baseline is not None:
        declared = dict(spec.categorical_mapping())
        for column, levels in baseline.levels:
            declared.setdefault(column, CategoricalSpec(levels=tuple(levels)))
        spec = replace(spec, categorical=tuple(declared.items()))
    reads = 0

    def counted() -> Iterable[Mapping[str, Any]]:
        nonlocal reads
        reads += 1
        return chunks()

    # A night works on matrices of a few columns (the chunk QRs are tall but narrow):
    # with BLAS threads, every small solve paid the threads' start-up, ~100x its cost on a
    # loaded two-core machine.
    with threadpool_limits(limits=1, user_api="blas"):
        one, factors = prepare_candidates(
            spec, counted(), strict=strict, read_again=None if baseline else counted,
            all_chunks=chunks)
        ordered = in_time_order() if callable(in_time_order) else in_time_order
        two = residual_pass(counted(), one.design, one.state, factors, time_column=time_column,
                            key_column=key_column or time_column, in_time_order=ordered,
                            baseline=baseline, options=options)
        return _assemble(spec, one, factors, two, reads)


def _assemble(spec: FamilySpec, one: Any, factors: Any, two: PassTwoResult,
              reads: int) -> NightlyEvaluation:
    fits = [result_of(one, m, factors[m], coefficients=two.refined_coefficients[m],
                      ssr=two.refined_ssr[m], refinement_steps=1)
            for m in range(len(factors))]
    report = compare_fits(spec, fits, one.design.models, rows=family_rows(spec, one, reads))
    checks: dict[str, tuple[CheckResult, ...]] = {
        name: run_checks(two, m) for m, name in enumerate(spec.names)}
    changes = {name: estimate_change(two, m) for m, name in enumerate(spec.names)}
    return NightlyEvaluation(replace(report, checks=checks), two, changes)
