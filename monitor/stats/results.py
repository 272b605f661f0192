"""Fit results: plain, frozen, serialisable data, and the statistics that fill them.

Conventions (stated once, here)
-------------------------------
* ``n_parameters`` = ``rank``: the number of estimated mean coefficients,
  intercept included, aliased ones excluded.  ``df_model`` is ``rank − 1`` with
  an intercept and ``rank`` without; ``df_resid = n − rank``.
* Sums of squares: ``ss_model`` is centred (about the mean of y) when the model
  has an intercept and uncentred (about 0) otherwise, and ``ss_total =
  ss_model + ss_resid`` accordingly, so R² of a model without intercept is the
  uncentred one (as NIST certifies for NoInt1/NoInt2).  Never compare R² between
  models with and without intercept; use an information criterion.
* Log-likelihood: the Gaussian one at the maximum-likelihood variance, constants
  kept: ``ℓ = −(n/2)·(ln 2π + ln(SSR/n) + 1)``.
* AIC ``= −2ℓ + 2K`` and BIC ``= −2ℓ + K·ln n`` with ``K = rank``, the mean
  coefficients only, as statsmodels counts.  The other common convention (Burnham
  & Anderson; R's ``AIC(lm)``) also counts the error variance, ``K + 1``: that
  shifts every AIC by 2 and every BIC by ``ln n``, and changes no difference
  between models fitted to the same rows, hence no ranking.
* AICc is Hurvich & Tsai's regression form, which counts the error variance:
  ``AICc = −2ℓ + 2k + 2k(k+1)/(n−k−1)`` with ``k = rank + 1``; equal to
  ``n·ln(SSR/n) + n·(n+rank)/(n−rank−2)`` plus the constant ``n·(ln 2π + 1)``.
  It is not shift-invariant, so this one count is used everywhere.
* An exact fit at the data's precision: a residual sum of squares at or below
  ``u²·ss_total`` (``u = 2⁻⁵³``, the unit round-off) is smaller than the rounding
  of the response values themselves when they were stored as doubles, so it
  carries no information and is reported as 0 (σ = 0, F = ∞).  NIST certifies
  its Wampler2 polynomial, whose decimal data are fitted exactly, in this way;
  the doubles nearest its data leave an SSR of about 0.05·u²·Σy².
* Non-finite values are kept as ``float('inf')``/``nan`` in the objects and become
  ``null`` in JSON (:func:`to_jsonable`).

References
----------
Akaike, H. (1974). A new look at the statistical model identification. IEEE
Transactions on Automatic Control 19(6), 716-723.
Schwarz, G. (1978). Estimating the dimension of a model. Annals of Statistics
6(2), 461-464.
Hurvich, C. M., Tsai, C.-L. (1989). Regression and time series model selection in
small samples. Biometrika 76(2), 297-307.
Draper, N. R., Smith, H. (1998). Applied Regression Analysis, 3rd ed., Wiley,
ch. 1-2 (ANOVA decomposition and the overall F-test).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

__all__ = [
    "EXACT_FIT_LEVEL",
    "Coefficient",
    "FitResult",
    "information_criteria",
    "make_fit_result",
    "to_jsonable",
]


#: Residual sums of squares at or below this fraction of the total sum of squares
#: are rounding of the data, not residual variation (see the module notes).
EXACT_FIT_LEVEL = 2.0**-106


@dataclass(frozen=True, slots=True)
class Coefficient:
    """One estimated coefficient; every number is ``nan`` for an aliased term."""

    term: str
    estimate: float
    std_error: float
    t_statistic: float
    p_value: float
    ci_lower: float
    ci_upper: float
    aliased: bool = False


@dataclass(frozen=True, slots=True)
class FitResult:
    """Everything one fitted linear model reports.

    ``covariance`` is the estimated covariance matrix of the non-aliased
    coefficients (row-major tuples, in the order of ``coefficients`` without the
    aliased terms); the drift checks use it.
    """

    formula: str
    has_intercept: bool
    n: int
    rank: int
    df_model: int
    df_resid: int
    ss_model: float
    ss_resid: float
    ss_total: float
    ms_model: float
    ms_resid: float
    f_statistic: float
    f_pvalue: float
    r_squared: float
    adj_r_squared: float
    sigma: float
    log_likelihood: float
    aic: float
    bic: float
    aicc: float
    coefficients: tuple[Coefficient, ...]
    aliased_terms: tuple[str, ...]
    dropped_rows: int
    unseen_levels: Mapping[str, Mapping[str, int]]
    covariance: tuple[tuple[float, ...], ...]
    refinement_steps: int = 0
    confidence_level: float = 0.95

    @property
    def n_parameters(self) -> int:
        """Estimated mean coefficients (intercept included); equals ``rank``."""
        return self.rank

    @property
    def terms(self) -> tuple[str, ...]:
        return tuple(c.term for c in self.coefficients)

    def params(self) -> dict[str, float]:
        """Estimates by term label (aliased terms give ``nan``)."""
        return {c.term: c.estimate for c in self.coefficients}

    def to_dict(self) -> dict[str, Any]:
        """The JSON shape of ``regwarden fit --format json`` (non-finite -> None)."""
        data = dataclasses.asdict(self)
        data["coefficients"] = [
            {k: v for k, v in c.items() if k != "aliased"} for c in data["coefficients"]
        ]
        data["aliased_terms"] = list(self.aliased_terms)
        data["unseen_levels"] = {k: dict(v) for k, v in self.unseen_levels.items()}
        data["covariance"] = [list(row) for row in self.covariance]
        return to_jsonable(data)


def to_jsonable(value: Any) -> Any:
    """Recursively turn numpy scalars into builtins and non-finite floats into ``None``."""
    if isinstance(value, Mapping):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, (np.floating, float)):
        number = float(value)
        return number if math.isfinite(number) else None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, np.ndarray):
        return to_jsonable(value.tolist())
    return value


def information_criteria(log_likelihood: float, rank: int, n: int) -> tuple[float, float, float]:
    """AIC, BIC (K = rank) and Hurvich–Tsai AICc (k = rank + 1); see the module notes."""
    aic = -2.0 * log_likelihood + 2.0 * rank
    bic = -2.0 * log_likelihood + rank * math.log(n)
    k = rank + 1
    aicc = -2.0 * log_likelihood + 2.0 * k + (2.0 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0
                                             else math.inf)
    return aic, bic, aicc


def make_fit_result(
    *,
    formula: str,
    labels: Sequence[str],
    estimated: Sequence[bool],
    has_intercept: bool,
    n: int,
    coefficients: np.ndarray,
    unscaled_covariance: np.ndarray,
    ss_resid: float,
    ss_model: float,
    dropped_rows: int,
    unseen_levels: Mapping[str, Mapping[str, int]],
    refinement_steps: int = 0,
    confidence_level: float = 0.95,
) -> FitResult:
    """Assemble a :class:`FitResult` from the estimates and the two sums of squares.

    ``labels``/``estimated`` list every term of the model in order; the arrays
    hold the estimated (non-aliased) terms only.
    """
    rank = int(len(coefficients))
    df_model = rank - 1 if has_intercept else rank
    df_resid = n - rank
    ss_resid = max(float(ss_resid), 0.0)
    ss_model = max(float(ss_model), 0.0)
    if ss_resid <= EXACT_FIT_LEVEL * (ss_model + ss_resid):
        ss_resid = 0.0  # exact fit at the precision of the data (module notes)
    ss_total = ss_model + ss_resid
    ms_resid = ss_resid / df_resid if df_resid > 0 else math.nan
    ms_model = ss_model / df_model if df_model > 0 else math.nan
    if df_model > 0 and df_resid > 0:
        f_statistic = ms_model / ms_resid if ms_resid > 0 else math.inf
        f_pvalue = float(stats.f.sf(f_statistic, df_model, df_resid)) if ms_resid > 0 else 0.0
    else:
        f_statistic = f_pvalue = math.nan
    r_squared = ss_model / ss_total if ss_total > 0 else math.nan
    intercept_count = 1 if has_intercept else 0
    adj_r_squared = (1.0 - (n - intercept_count) / df_resid * (1.0 - r_squared)
                     if df_resid > 0 else math.nan)
    sigma = math.sqrt(ms_resid) if df_resid > 0 else math.nan
    log_likelihood = (-0.5 * n * (math.log(2.0 * math.pi) + math.log(ss_resid / n) + 1.0)
                      if ss_resid > 0 else math.inf)
    aic, bic, aicc = information_criteria(log_likelihood, rank, n)

    covariance = np.asarray(unscaled_covariance, dtype=np.float64) * (ms_resid if df_resid > 0
                                                                      else math.nan)
    std_errors = np.sqrt(np.clip(np.diag(covariance), 0.0, None)) if rank else np.zeros(0)
    critical = float(stats.t.ppf(0.5 + confidence_level / 2.0, df_resid)) if df_resid > 0 else math.nan
    rows: list[Coefficient] = []
    position = 0
    for label, is_estimated in zip(labels, estimated, strict=True):
        if not is_estimated:
            nan = math.nan
            rows.append(Coefficient(label, nan, nan, nan, nan, nan, nan, aliased=True))
            continue
        estimate = float(coefficients[position])
        error = float(std_errors[position])
        with np.errstate(divide="ignore", invalid="ignore"):
            t_value = estimate / error if error > 0 else (math.copysign(math.inf, estimate)
                                                          if estimate != 0 else math.nan)
        p_value = (float(2.0 * stats.t.sf(abs(t_value), df_resid))
                   if df_resid > 0 and not math.isnan(t_value) else math.nan)
        rows.append(Coefficient(label, estimate, error, float(t_value), p_value,
                                estimate - critical * error, estimate + critical * error))
        position += 1
    return FitResult(
        formula=formula,
        has_intercept=has_intercept,
        n=int(n),
        rank=rank,
        df_model=int(df_model),
        df_resid=int(df_resid),
        ss_model=ss_model,
        ss_resid=ss_resid,
        ss_total=ss_total,
        ms_model=float(ms_model),
        ms_resid=float(ms_resid),
        f_statistic=float(f_statistic),
        f_pvalue=float(f_pvalue),
        r_squared=float(r_squared),
        adj_r_squared=float(adj_r_squared),
        sigma=float(sigma),
        log_likelihood=float(log_likelihood),
        aic=float(aic),
        bic=float(bic),
        aicc=float(aicc),
        coefficients=tuple(rows),
        aliased_terms=tuple(label for label, e in zip(labels, estimated, strict=True) if not e),
        dropped_rows=int(dropped_rows),
        unseen_levels={k: dict(v) for k, v in unseen_levels.items()},
        covariance=tuple(tuple(float(v) for v in row) for row in covariance),
        refinement_steps=int(refinement_steps),
        confidence_level=float(confidence_level),
    )
