"""The small public Python API for one-off fits (``monitor.fit``)."""

from __future__ import annotations

from collections.abc import Mapping

from ._frames import DEFAULT_CHUNK_ROWS, TableInput, chunk_source, column_names
from .errors import DataValidationError
from .stats.fitting import fit_formulas
from .stats.formula import CategoricalSpec, parse_formula
from .stats.results import FitResult

__all__ = ["fit", "require_columns"]


def require_columns(data: TableInput, needed: list[str] | tuple[str, ...], where: str) -> None:
    """Raise a clear error when a column the formulas need is absent."""
    available = column_names(data)
    missing = [c for c in needed if c not in available]
    if missing:
        shown = ", ".join(available[:25]) + (" ..." if len(available) > 25 else "")
        raise DataValidationError(
            f"column {missing[0]!r} is not in the data"
            + (f" (nor {', '.join(map(repr, missing[1:]))})" if len(missing) > 1 else ""),
            where=where,
            hint=f"the data have: {shown or '(no columns)'}; fix the formula or the data",
        )


def fit(
    data: TableInput,
    formula: str,
    *,
    strict: bool = False,
    categorical: Mapping[str, CategoricalSpec] | None = None,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    refinement_passes: int = 3,
) -> FitResult:
    """Fit one linear model written in Wilkinson–Rogers notation.

    Parameters
    ----------
    data
        A pandas DataFrame, a pyarrow Table, or the path of a CSV or Parquet file.
    formula
        For example ``"load ~ temperature + wind + weekend"``; see
        :mod:`monitor.stats.formula` for the notation.
    strict
        Refuse rows with missing, non-finite or unseen values (naming the column
        and the first row) instead of leaving them out and counting them.
    categorical
        Declared levels / reference level per categorical column.
    refinement_passes
        Extra reads of the rows that refine the coefficients with accurately
        computed residuals (0 turns refinement off).

    Returns
    -------
    FitResult
    """
    parsed = parse_formula(formula)
    require_columns(data, list(parsed.columns), f"formula {formula!r}")
    source = chunk_source(data, list(parsed.columns), chunk_rows)
    _, results = fit_formulas(source, [parsed], categorical=categorical, strict=strict,
                              refinement_passes=refinement_passes)
    return results[0]
