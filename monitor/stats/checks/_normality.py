"""Normality of the residuals: Jarque–Bera, D'Agostino–Pearson (all rows, from power
sums), Shapiro–Wilk and Anderson–Darling (on the seeded random sample).

OLS residuals are not independent (their covariance is σ²(I − H)), so each test
is approximate; the effect is small when p/n is small.
"""

from __future__ import annotations

import math
import warnings
from typing import TYPE_CHECKING

import numpy as np
from scipy import special, stats

from ._common import degenerate_residuals, tested
from ._result import CheckResult, not_applicable

if TYPE_CHECKING:
    from ..residual_pass import PassTwoResult

__all__ = ["anderson_darling", "anderson_darling_p_value", "dagostino_pearson", "jarque_bera",
           "shapiro_wilk", "skewness_z", "kurtosis_z"]


def _moments(result: PassTwoResult, model: int) -> tuple[float, float]:
    n = result.n
    m2 = result.m2[model] / n
    skewness = (result.m3[model] / n) / m2**1.5
    kurtosis = (result.m4[model] / n) / m2**2
    return float(skewness), float(kurtosis)


def jarque_bera(result: PassTwoResult, model: int) -> CheckResult:
    """JB = n/6·(S² + (K − 3)²/4) ~ χ²(2), from the merged central power sums."""
    n = result.n
    if n < 3:
        return not_applicable("jarque_bera", f"needs at least 3 rows, the window has {n}", n)
    reason = degenerate_residuals(result, model)
    if reason:
        return not_applicable("jarque_bera", reason, n)
    skewness, kurtosis = _moments(result, model)
    statistic = n / 6.0 * (skewness**2 + (kurtosis - 3.0) ** 2 / 4.0)
    detail = {"skewness": skewness, "kurtosis": kurtosis}
    if n < 200:
        detail["note"] = ("the χ²(2) approximation is poor below a few hundred rows; lean on "
                          "shapiro_wilk and anderson_darling")
    return tested(result, "jarque_bera", statistic, 2, stats.chi2.sf(statistic, 2), detail=detail)


def skewness_z(skewness: float, n: int) -> float:
    """D'Agostino's (1970) normal transform of the sample skewness √b1."""
    y = skewness * math.sqrt((n + 1) * (n + 3) / (6.0 * (n - 2)))
    beta2 = (3.0 * (n * n + 27 * n - 70) * (n + 1) * (n + 3)
             / ((n - 2.0) * (n + 5) * (n + 7) * (n + 9)))
    w2 = -1.0 + math.sqrt(2.0 * (beta2 - 1.0))
    delta = 1.0 / math.sqrt(0.5 * math.log(w2))
    alpha = math.sqrt(2.0 / (w2 - 1.0))
    return delta * math.asinh(y / alpha)


def kurtosis_z(kurtosis: float, n: int) -> float:
    """Anscombe & Glynn's (1983) normal transform of the sample kurtosis b2."""
    expected = 3.0 * (n - 1) / (n + 1)
    variance = 24.0 * n * (n - 2) * (n - 3) / ((n + 1) ** 2 * (n + 3) * (n + 5))
    x = (kurtosis - expected) / math.sqrt(variance)
    sqrt_beta1 = (6.0 * (n * n - 5 * n + 2) / ((n + 7) * (n + 9))
                  * math.sqrt(6.0 * (n + 3) * (n + 5) / (n * (n - 2) * (n - 3))))
    a = 6.0 + 8.0 / sqrt_beta1 * (2.0 / sqrt_beta1 + math.sqrt(1.0 + 4.0 / sqrt_beta1**2))
    term1 = 1.0 - 2.0 / (9.0 * a)
    denominator = 1.0 + x * math.sqrt(2.0 / (a - 4.0))
    if denominator == 0.0:
        return math.nan
    term2 = math.copysign(((1.0 - 2.0 / a) / abs(denominator)) ** (1.0 / 3.0), denominator)
    return (term1 - term2) / math.sqrt(2.0 / (9.0 * a))


def dagostino_pearson(result: PassTwoResult, model: int) -> CheckResult:
    """K² = Z(√b1)² + Z(b2)² ~ χ²(2) (D'Agostino & Pearson 1973)."""
    n = result.n
    if n < 8:
        return not_applicable("dagostino_pearson", f"needs at least 8 rows, the window has {n}", n)
    reason = degenerate_residuals(result, model)
    if reason:
        return not_applicable("dagostino_pearson", reason, n)
    skewness, kurtosis = _moments(result, model)
    z_skew, z_kurt = skewness_z(skewness, n), kurtosis_z(kurtosis, n)
    statistic = z_skew**2 + z_kurt**2
    detail = {"z_skewness": z_skew, "z_kurtosis": z_kurt}
    if n < 20:
        detail["note"] = "the kurtosis transform is poor below 20 rows"
    return tested(result, "dagostino_pearson", statistic, 2, stats.chi2.sf(statistic, 2),
                  detail=detail)


def _sample(result: PassTwoResult, model: int, check: str, minimum: int
            ) -> tuple[np.ndarray | None, CheckResult | None]:
    sample = result.sample(model)
    if sample.size < minimum:
        return None, not_applicable(check, f"needs at least {minimum} rows, the "
                                    f"{'window' if result.sample_is_complete else 'sample'} "
                                    f"has {sample.size}", result.n)
    reason = degenerate_residuals(result, model)
    if reason or np.ptp(sample) == 0.0:
        return None, not_applicable(check, reason or "the sampled residuals are all equal",
                                    result.n)
    return sample, None


def _sampling(result: PassTwoResult, size: int) -> dict[str, object]:
    return {"sample_seed": result.options.seed, "sample_rows": size,
            "sample_is_every_row": result.sample_is_complete}


def shapiro_wilk(result: PassTwoResult, model: int) -> CheckResult:
    """Shapiro–Wilk W on the seeded random sample (scipy's AS R94 implementation)."""
    sample, missing = _sample(result, model, "shapiro_wilk", 3)
    if missing:
        return missing
    assert sample is not None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scipy warns above 5000 rows; the size is in detail
        outcome = stats.shapiro(sample)
    complete = result.sample_is_complete
    return tested(result, "shapiro_wilk", outcome.statistic, None, outcome.pvalue,
                  detail=_sampling(result, sample.size), exact=complete,
                  sample_size=None if complete else sample.size)


def anderson_darling_p_value(a2_star: float) -> float:
    """p-value of the modified statistic A*² for a normal with estimated mean and SD.

    D'Agostino & Stephens (1986), Goodness-of-Fit Techniques, Table 4.9 (the same
    piecewise-exponential formulas as statsmodels ``normal_ad``).
    """
    a = a2_star
    if a < 0.2:
        return 1.0 - math.exp(-13.436 + 101.14 * a - 223.73 * a * a)
    if a < 0.34:
        return 1.0 - math.exp(-8.318 + 42.796 * a - 59.938 * a * a)
    if a < 0.6:
        return math.exp(0.9177 - 4.279 * a - 1.38 * a * a)
    if a <= 13.0:
        return math.exp(1.2937 - 5.709 * a + 0.0186 * a * a)
    return 0.0


def anderson_darling(result: PassTwoResult, model: int) -> CheckResult:
    """A² with mean and SD (ddof = 1) estimated, on the same sample as Shapiro–Wilk."""
    sample, missing = _sample(result, model, "anderson_darling", 8)
    if missing:
        return missing
    assert sample is not None
    n = sample.size
    w = np.sort((sample - sample.mean()) / sample.std(ddof=1))
    i = np.arange(1, n + 1)
    statistic = -n - float(np.sum((2 * i - 1) * (special.log_ndtr(w)
                                                 + special.log_ndtr(-w[::-1])))) / n
    modified = statistic * (1.0 + 0.75 / n + 2.25 / n**2)
    detail = _sampling(result, n)
    detail["modified_statistic"] = modified
    detail["critical_values_modified"] = {"15%": 0.561, "10%": 0.631, "5%": 0.752,
                                          "2.5%": 0.873, "1%": 1.035}
    complete = result.sample_is_complete
    return tested(result, "anderson_darling", statistic, None, anderson_darling_p_value(modified),
                  detail=detail, exact=complete, sample_size=None if complete else n)
