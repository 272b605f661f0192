"""The public face of the assumption checks: ``check_data`` and ``build_baseline``.

Both read the rows exactly twice (pass 1: the least-squares state; pass 2: every
check's sums), whatever their number, holding one chunk at a time.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._api import require_columns
from ._frames import DEFAULT_CHUNK_ROWS, TableInput, chunk_source
from .errors import DataValidationError
from .stats.changepoint import ChangeEstimate, estimate_change
from .stats.checks import CheckResult, run_checks
from .stats.checks._result import plain
from .stats.drift import BaselineSnapshot, build_snapshot
from .stats.fitting import PassOne, derive_factor, pass_one
from .stats.formula import CategoricalSpec, Design, parse_formula
from .stats.residual_pass import CheckOptions, PassTwoResult, residual_pass

__all__ = ["CheckReport", "build_baseline", "check_data"]


@dataclass(frozen=True, slots=True)
class CheckReport:
    """The checks of one model on one window (and against a baseline when given).

    ``rows`` counts the rows used (after leaving out unusable ones, counted in
    ``dropped_rows``).  Verdicts are statistical evidence, not proof: people who
    know the data decide what to do about them.
    """

    formula: str
    rows: int
    dropped_rows: int
    time_column: str | None
    key_column: str | None
    baseline_rows: int | None
    checks: tuple[CheckResult, ...]
    change: ChangeEstimate | None
    refined_coefficients: tuple[float, ...]

    def to_dict(self) -> dict[str, Any]:
        data = {field.name: getattr(self, field.name) for field in dataclasses.fields(self)}
        data["checks"] = [c.to_dict() for c in self.checks]
        data["change"] = None if self.change is None else self.change.to_dict()
        return plain(data)  # type: ignore[no-any-return]

    def check(self, name: str) -> CheckResult:
        """The result of one check id (KeyError naming the known ids)."""
        for result in self.checks:
            if result.check == name:
                return result
        raise KeyError(f"no check {name!r} in this report; it has: "
                       f"{', '.join(c.check for c in self.checks)}")


def _passes(data: TableInput, formula: str, *, time_column: str | None,
            key_column: str | None, design: Design | None,
            categorical: Mapping[str, CategoricalSpec] | None, chunk_rows: int,
            strict: bool, in_time_order: bool, baseline: BaselineSnapshot | None,
            break_date: Any, options: CheckOptions) -> tuple[PassOne, PassTwoResult]:
    parsed = parse_formula(formula)
    extra = [c for c in (time_column, key_column) if c is not None]
    columns = list(dict.fromkeys([*parsed.columns, *extra]))
    require_columns(data, columns, f"formula {formula!r}")
    source = chunk_source(data, columns, chunk_rows)
    one = pass_one(source(), [parsed], design=design, categorical=categorical, strict=strict)
    factor = derive_factor(one, 0)
    break_value = None
    if break_date is not None:
        if time_column is None:
            raise DataValidationError("a break date needs a time column",
                                      where="break date", hint="pass time_column too")
        break_value = _as_time_value(next(iter(source()))[time_column], break_date, time_column)
    two = residual_pass(source(), one.design, one.state, [factor], time_column=time_column,
                        key_column=key_column, in_time_order=in_time_order, baseline=baseline,
                        break_value=break_value, options=options)
    return one, two


def _as_time_value(sample: np.ndarray, value: Any, column: str) -> Any:
    """The break date in the time column's own type."""
    array = np.asarray(sample)
    try:
        if array.dtype.kind == "M":
            unit = np.datetime_data(array.dtype)[0]
            return np.datetime64(value, unit)
        if array.dtype.kind in "fiu":
            return float(value)
    except (TypeError, ValueError) as error:
        raise DataValidationError(
            f"break date {value!r} cannot be read as a value of column {column!r} "
            f"(type {array.dtype})", where=f"column {column!r}",
            hint="give the date in ISO form (2024-05-01) or a number like the column's") from error
    return value


def build_baseline(
    data: TableInput,
    formula: str,
    *,
    time_column: str | None = None,
    categorical: Mapping[str, CategoricalSpec] | None = None,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    strict: bool = False,
    options: CheckOptions | None = None,
    window_start: str | None = None,
    window_end: str | None = None,
) -> BaselineSnapshot:
    """Summarise a baseline window into a :class:`BaselineSnapshot` (two reads of its rows)."""
    options = options or CheckOptions()
    _, two = _passes(data, formula, time_column=time_column, key_column=None, design=None,
                     categorical=categorical, chunk_rows=chunk_rows, strict=strict,
                     in_time_order=time_column is not None, baseline=None, break_date=None,
                     options=options)
    return build_snapshot(two, window_start=window_start, window_end=window_end)


def check_data(
    data: TableInput,
    formula: str,
    *,
    time_column: str | None = None,
    key_column: str | None = None,
    baseline: TableInput | BaselineSnapshot | None = None,
    break_date: Any = None,
    in_time_order: bool = True,
    categorical: Mapping[str, CategoricalSpec] | None = None,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    strict: bool = False,
    options: CheckOptions | None = None,
) -> CheckReport:
    """Run every assumption check (and, with a baseline, every drift check) on a window.

    Parameters
    ----------
    data
        The window: a DataFrame, a pyarrow Table, or a CSV/Parquet path.
    formula
        The model, e.g. ``"load ~ temperature + wind"``.
    time_column
        Column the rows are ordered by; the order-dependent checks (Durbin–Watson,
        Breusch–Godfrey, Ljung–Box, CUSUM, change point) need it and are "not
        applicable" without it or when the rows are not in its order.
    key_column
        Column naming rows in the influence report (default: ``time_column``, then
        the row number).
    baseline
        A baseline window (same kinds as ``data``) or a stored
        :class:`BaselineSnapshot`: adds the drift checks and the Chow test between
        the windows.
    break_date
        A value of ``time_column`` (ISO date text for timestamps): adds Chow's test
        for a break there.
    in_time_order
        False when the source does not deliver rows in time order.
    options
        :class:`~monitor.stats.residual_pass.CheckOptions` (sample size, seed, lags...).
    """
    options = options or CheckOptions()
    design = None
    snapshot: BaselineSnapshot | None = None
    baseline_rows = None
    if isinstance(baseline, BaselineSnapshot):
        snapshot = baseline
        declared = dict(categorical or {})
        for column, levels in snapshot.levels:
            declared.setdefault(column, CategoricalSpec(levels=levels))
        categorical = declared
    elif baseline is not None:
        one_b, two_b = _passes(baseline, formula, time_column=time_column, key_column=None,
                               design=None, categorical=categorical, chunk_rows=chunk_rows,
                               strict=strict, in_time_order=in_time_order, baseline=None,
                               break_date=None, options=options)
        snapshot = build_snapshot(two_b)
        design = one_b.design
    if snapshot is not None:
        baseline_rows = snapshot.n
    one, two = _passes(data, formula, time_column=time_column, key_column=key_column,
                       design=design, categorical=categorical, chunk_rows=chunk_rows,
                       strict=strict, in_time_order=in_time_order, baseline=snapshot,
                       break_date=break_date, options=options)
    checks = run_checks(two, 0)
    return CheckReport(
        formula=formula, rows=two.n, dropped_rows=one.totals.dropped_rows,
        time_column=time_column, key_column=key_column or time_column,
        baseline_rows=baseline_rows, checks=checks, change=estimate_change(two, 0),
        refined_coefficients=tuple(float(v) for v in two.refined_coefficients[0]))
