"""The most likely change point of a model's residuals, from the cumulative-sum path.

For one shift in the mean of the residuals at an unknown row ``k``, the
likelihood-ratio (least-squares) estimate of ``k`` maximises the standardized
cumulative sum ``|S_k| · √(n / (k (n − k)))`` (with ``S_n ≈ 0`` for a model with an
intercept), where ``S_k`` is the sum of the first ``k`` residuals in time order.
Pass 2 tracks that maximum as the rows stream and keeps a thinned path of
``S_k`` for plots; this module turns them into a :class:`ChangeEstimate`.

This is an estimate of *where* a change most likely happened, not a test of
*whether* one did (the ``cusum`` check is that test).

References
----------
Hinkley, D. V. (1970). Inference about the change-point in a sequence of random
variables. Biometrika 57(1), 1-17.
Csörgő, M., Horváth, L. (1997). Limit Theorems in Change-Point Analysis, §1.4.
Wiley.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from .checks._result import plain

if TYPE_CHECKING:
    from .residual_pass import PassTwoResult

__all__ = ["ChangeEstimate", "estimate_change"]


@dataclass(frozen=True, slots=True)
class ChangeEstimate:
    """Most likely row of a single mean shift in the residuals.

    Attributes
    ----------
    row
        0-based position among the rows used; the change is between ``row`` and
        ``row + 1``.
    key
        The key (or time) of that row.
    statistic
        ``max_k |S_k|·√(n/(k(n−k))) / σ̂``: the standardized cumulative sum there.
    mean_before, mean_after
        Mean residual of the rows up to ``row`` and after it.
    path_rows, path_values, path_keys
        A thinned path of ``S_k`` (at most ``CheckOptions.path_points`` points).
    """

    row: int
    key: Any
    statistic: float
    mean_before: float
    mean_after: float
    rows_before: int
    rows_after: int
    path_rows: tuple[int, ...]
    path_values: tuple[float, ...]
    path_keys: tuple[Any, ...]

    def to_dict(self) -> dict[str, Any]:
        return plain(dataclasses.asdict(self))  # type: ignore[no-any-return]


def estimate_change(result: PassTwoResult, model: int) -> ChangeEstimate | None:
    """The change estimate of one model, or None when the rows are not in time order."""
    n = result.n
    if not result.ordered or n < 3 or result.change_stat[model] < 0:
        return None
    p = result.factors[model].n_parameters
    sigma = math.sqrt(float(result.sum_squares[model]) / max(n - p, 1))
    row = int(result.change_index[model])
    k = row + 1
    partial = float(result.change_partial[model])
    total = float(result.cusum_sum[model])
    rows = np.concatenate(result.path_index) if result.path_index else np.zeros(0, dtype=int)
    values = (np.concatenate([v[:, model] for v in result.path_values])
              if result.path_values else np.zeros(0))
    keys = np.concatenate(result.path_keys) if result.path_keys else np.zeros(0)
    return ChangeEstimate(
        row=row, key=plain(result.change_key[model]),
        statistic=float(result.change_stat[model]) / sigma if sigma > 0 else math.nan,
        mean_before=partial / k, mean_after=(total - partial) / (n - k) if n > k else math.nan,
        rows_before=k, rows_after=n - k,
        path_rows=tuple(int(r) for r in rows), path_values=tuple(float(v) for v in values),
        path_keys=tuple(plain(list(keys))))
