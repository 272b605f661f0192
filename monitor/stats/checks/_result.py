"""The plain-data result of one check, the verdict rule, and the registry of check ids.

Every check returns a :class:`CheckResult`, whatever went wrong: data a check
cannot use (too few rows, no time order, a constant residual, a singular
auxiliary regression) give ``applicable=False`` with the ``reason`` and a
``verdict`` of ``"not_applicable"``; they never raise.

Verdicts are each check's own reading of its threshold(s) (``pass`` / ``warn`` /
``fail``).  Turning verdicts into alerts (persistence, false-alarm control,
severity) belongs to the orchestration layer.  A verdict is statistical
evidence, not proof: people who know the data decide what to do.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

__all__ = [
    "CHECKS",
    "CheckResult",
    "CheckSpec",
    "DEFAULT_FAIL_LEVEL",
    "DEFAULT_WARN_LEVEL",
    "not_applicable",
    "p_value_verdict",
    "plain",
    "upper_verdict",
]

#: p below this fails a check with a nominal level (a regwarden default, common practice).
DEFAULT_FAIL_LEVEL = 0.01
#: p below this (and not below the fail level) warns (a regwarden default, common practice).
DEFAULT_WARN_LEVEL = 0.05

PASS, WARN, FAIL, NOT_APPLICABLE = "pass", "warn", "fail", "not_applicable"


@dataclass(frozen=True, slots=True)
class CheckResult:
    """One check of one model on one window.

    Attributes
    ----------
    check
        The check id (see :data:`CHECKS`).
    statistic
        The test statistic (``nan`` when not applicable); its meaning per id is in
        :data:`CHECKS`.
    df
        Degrees of freedom: a number, a pair (numerator, denominator), or ``None``.
    p_value
        The p-value, or ``None`` for checks read against thresholds only.
    verdict
        ``"pass"``, ``"warn"``, ``"fail"`` or ``"not_applicable"``.
    thresholds
        The thresholds the verdict used, by name (e.g. ``{"warn": 0.05, "fail": 0.01}``
        on the p-value, or on the statistic where ``thresholds_on`` says so).
    exact
        True when computed from every row; False when computed from a bounded random
        sample (then ``sample_size`` is the size) or from an approximation that is
        stated in ``detail``.
    sample_size
        Rows in the random sample, or ``None`` when every row was used.
    rows
        Rows of the window the check is about.
    detail
        Per-term values, top rows, secondary statistics, conventions used.
    reference
        The published source of the method.
    applicable, reason
        False with the reason when the data cannot support the check.
    """

    check: str
    statistic: float
    df: float | tuple[float, float] | None
    p_value: float | None
    verdict: str
    thresholds: Mapping[str, float]
    exact: bool
    sample_size: int | None
    rows: int
    detail: Mapping[str, Any]
    reference: str
    applicable: bool = True
    reason: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (non-finite numbers become ``None``)."""
        return plain(dataclasses.asdict(self))

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> CheckResult:
        values = dict(data)
        df = values.get("df")
        if isinstance(df, list):
            values["df"] = tuple(df)
        statistic = values.get("statistic")
        values["statistic"] = math.nan if statistic is None else float(statistic)
        return cls(**values)


def plain(value: Any) -> Any:
    """Builtin types only: numpy scalars to float/int, tuples to lists, nan/inf to None."""
    if isinstance(value, Mapping):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if hasattr(value, "item") and callable(value.item) and getattr(value, "ndim", 0) == 0:
        value = value.item()
    if hasattr(value, "tolist") and not isinstance(value, (int, float)):
        return plain(value.tolist())
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, int):
        return value
    if hasattr(value, "isoformat"):
        return value.isoformat()
    return str(value)


def p_value_verdict(p_value: float, fail: float = DEFAULT_FAIL_LEVEL,
                    warn: float = DEFAULT_WARN_LEVEL) -> str:
    """``fail`` when p < fail, ``warn`` when p < warn, else ``pass``."""
    if not math.isfinite(p_value):
        return NOT_APPLICABLE
    if p_value < fail:
        return FAIL
    if p_value < warn:
        return WARN
    return PASS


def upper_verdict(value: float, warn: float, fail: float) -> str:
    """``fail`` when value > fail, ``warn`` when value > warn, else ``pass``."""
    if not math.isfinite(value):
        return FAIL if value == math.inf else NOT_APPLICABLE
    if value > fail:
        return FAIL
    if value > warn:
        return WARN
    return PASS


def not_applicable(check: str, reason: str, rows: int, *, detail: Mapping[str, Any] | None = None
                   ) -> CheckResult:
    """The documented result of a check the data cannot support."""
    return CheckResult(check=check, statistic=math.nan, df=None, p_value=None,
                       verdict=NOT_APPLICABLE, thresholds={}, exact=True, sample_size=None,
                       rows=int(rows), detail=dict(detail or {}),
                       reference=CHECKS[check].reference if check in CHECKS else "",
                       applicable=False, reason=reason)


@dataclass(frozen=True, slots=True)
class CheckSpec:
    """What a check id reports, its defaults and its published source."""

    check: str
    family: str
    statistic: str
    p_value: str
    defaults: str
    reference: str
    needs: str = "one window"


def _spec(check: str, family: str, statistic: str, p_value: str, defaults: str, reference: str,
          needs: str = "one window") -> tuple[str, CheckSpec]:
    return check, CheckSpec(check, family, statistic, p_value, defaults, reference, needs)


#: Every check id, in report order, with what its statistic and p-value are.
CHECKS: dict[str, CheckSpec] = dict([
    _spec("jarque_bera", "normality", "JB = n/6·(S² + (K−3)²/4) from the biased sample skewness S "
          "and kurtosis K of all residuals", "χ²(2) upper tail (asymptotic; poor below a few "
          "hundred rows)", "all rows; n ≥ 3",
          "Jarque, C. M., Bera, A. K. (1987). A test for normality of observations and regression "
          "residuals. International Statistical Review 55(2), 163-172."),
    _spec("dagostino_pearson", "normality", "K² = Z(√b1)² + Z(b2)², the skewness z of D'Agostino "
          "(1970) and the kurtosis z of Anscombe & Glynn (1983), from all residuals",
          "χ²(2) upper tail", "all rows; n ≥ 8",
          "D'Agostino, R. B., Pearson, E. S. (1973). Tests for departure from normality. "
          "Biometrika 60(3), 613-622; D'Agostino, R. B. (1970) Biometrika 57, 679-681; Anscombe, "
          "F. J., Glynn, W. J. (1983) Biometrika 70, 227-234."),
    _spec("shapiro_wilk", "normality", "W of Shapiro & Wilk on a seeded random sample of "
          "residuals (Royston's algorithm AS R94, via scipy.stats.shapiro)",
          "Royston's normalising approximation", "sample of at most 5000 rows (seed in detail); "
          "3 ≤ n",
          "Shapiro, S. S., Wilk, M. B. (1965). Biometrika 52, 591-611; Royston, P. (1995). "
          "Algorithm AS R94. Applied Statistics 44(4), 547-551."),
    _spec("anderson_darling", "normality", "A² of Anderson & Darling with mean and SD estimated "
          "(SD with ddof=1), on the same random sample as shapiro_wilk; A*² = A²(1 + 0.75/n + "
          "2.25/n²) in detail", "D'Agostino & Stephens (1986) piecewise formulas in A*²",
          "sample of at most 5000 rows; n ≥ 8",
          "Anderson, T. W., Darling, D. A. (1954). JASA 49, 765-769; D'Agostino, R. B., "
          "Stephens, M. A. (eds.) (1986). Goodness-of-Fit Techniques, ch. 4. Marcel Dekker."),
    _spec("breusch_pagan", "constant variance", "original LM = ESS/2 of the regression of "
          "e²/σ̂²_ML on a constant and the model's regressors", "χ²(q), q = regressors besides "
          "the constant", "all rows",
          "Breusch, T. S., Pagan, A. R. (1979). Econometrica 47(5), 1287-1294."),
    _spec("breusch_pagan_studentized", "constant variance", "Koenker's LM = n·R² of the "
          "regression of e² on a constant and the model's regressors", "χ²(q)", "all rows",
          "Koenker, R. (1981). A note on studentizing a test for heteroscedasticity. Journal "
          "of Econometrics 17, 107-112."),
    _spec("white", "constant variance", "LM = n·R² of e² on a constant, the regressors, their "
          "squares and cross-products (duplicates removed by rank)", "χ²(q_W), q_W = rank − 1",
          "skipped when the auxiliary design would exceed 120 columns or leave fewer than 10 "
          "residual degrees of freedom",
          "White, H. (1980). Econometrica 48(4), 817-838."),
    _spec("durbin_watson", "independence", "d = Σ(e_t − e_{t−1})²/Σe_t² in time order",
          "one-sided against positive autocorrelation, P(d ≤ d_obs) under iid normal errors, "
          "from a beta distribution matched to the exact null mean and variance of d given X "
          "(the other side in detail)", "time-ordered rows; n > p + 2",
          "Durbin, J., Watson, G. S. (1950, 1951, 1971). Biometrika 37, 409-428; 38, 159-178; "
          "58, 1-19.", "time order"),
    _spec("breusch_godfrey", "independence", "LM = n·R² of e_t on a constant, the regressors "
          "and e_{t−1..t−L} (pre-sample residuals set to 0); F form in detail",
          "χ²(L); df = L", "L = min(10, n // 5)",
          "Breusch, T. S. (1978). Australian Economic Papers 17, 334-355; Godfrey, L. G. (1978). "
          "Econometrica 46, 1293-1301.", "time order"),
    _spec("ljung_box", "independence", "Q = n(n+2)·Σ_{k≤h} r_k²/(n−k) of the demeaned residuals",
          "χ²(h) (no degrees of freedom subtracted for the model); df = h", "h = min(10, n // 5)",
          "Ljung, G. M., Box, G. E. P. (1978). Biometrika 65(2), 297-303.", "time order"),
    _spec("reset", "functional form", "F for adding ŷ² and ŷ³ to the model",
          "F(2, n − p − 2)", "powers 2 and 3 of the fitted values",
          "Ramsey, J. B. (1969). JRSS B 31(2), 350-371."),
    _spec("vif", "collinearity", "the largest centred variance inflation factor 1/(1 − R_j²) "
          "over the model's terms (all in detail)", "none; thresholds 5 (warn) and 10 (fail)",
          "terms besides the intercept",
          "Marquardt, D. W. (1970). Technometrics 12(3), 591-612; Kutner, M. H. et al. (2005). "
          "Applied Linear Statistical Models, 5th ed., §10.5."),
    _spec("condition_index", "collinearity", "the largest Belsley–Kuh–Welsch condition index "
          "η = μ_max/μ_k of the design with every column (intercept included) scaled to unit "
          "length, not centred; variance-decomposition proportions in detail",
          "none; thresholds 30 (warn) and 100 (fail)", "the model's columns",
          "Belsley, D. A., Kuh, E., Welsch, R. E. (1980). Regression Diagnostics, ch. 3. Wiley."),
    _spec("outlier_bonferroni", "influence", "the largest absolute externally studentized "
          "residual t*", "Bonferroni: min(1, 2n·P(T_{n−p−1} > |t*|))", "top rows in detail",
          "Cook, R. D., Weisberg, S. (1982). Residuals and Influence in Regression, §2.2. "
          "Chapman & Hall."),
    _spec("cooks_distance", "influence", "the largest Cook's distance; counts above 4/n, the "
          "F(p, n−p) median and 1, leverage above 2p/n and 3p/n and |DFFITS| above 2√(p/n) in "
          "detail, with the top rows by key", "none; warn above the F(p, n−p) median, fail "
          "above 1", "top 10 rows",
          "Cook, R. D. (1977). Technometrics 19(1), 15-18; Belsley, Kuh & Welsch (1980), ch. 2."),
    _spec("cusum", "stability", "sup_t |Σ_{s≤t} e_s| / √(n·σ̂²), σ̂² = SSR/(n − p): "
          "the OLS-based CUSUM in time order", "P(sup of a Brownian bridge > statistic) "
          "(Kolmogorov distribution)", "time-ordered rows",
          "Ploberger, W., Krämer, W. (1992). The CUSUM test with OLS residuals. Econometrica "
          "60(2), 271-285.", "time order"),
    _spec("chow", "stability", "F = [(SSR_pooled − SSR_1 − SSR_2)/p] / [(SSR_1 + SSR_2)/(n − 2p)] "
          "for a break at a date, or between the baseline and the fresh window", "F(p, n − 2p)",
          "needs --break-date or a baseline",
          "Chow, G. C. (1960). Econometrica 28(3), 591-605.", "break date or baseline"),
    _spec("coefficient_wald", "drift", "W = (b_B − b_F)'(V_B + V_F)⁻¹(b_B − b_F)", "χ²(p)",
          "independent windows", "Wald, A. (1943). Trans. AMS 54, 426-482; e.g. Greene, W. H. "
          "Econometric Analysis, §5.4.", "baseline"),
    _spec("ks_residuals", "drift", "two-sample Kolmogorov–Smirnov D between the baseline's "
          "residuals and the frozen baseline model's forecast errors on the fresh rows",
          "scipy.stats.ks_2samp (exact for small samples, else asymptotic)",
          "bounded samples of both windows", "Smirnov, N. (1948). Annals of Mathematical "
          "Statistics 19, 279-281.", "baseline"),
    _spec("anderson_darling_ksample", "drift", "standardized k-sample Anderson–Darling T (midrank "
          "variant) on the same samples as ks_residuals", "Scholz & Stephens table "
          "interpolation, floored at 0.001 and capped at 0.25 (scipy.stats.anderson_ksamp)",
          "bounded samples", "Scholz, F. W., Stephens, M. A. (1987). JASA 82, 918-924.",
          "baseline"),
    _spec("psi", "drift", "population stability index Σ(p_F − p_B)·ln(p_F/p_B) of the forecast "
          "errors over the baseline's residual decile bins", "approximate: PSI·(1/n + 1/m)⁻¹ "
          "~ χ²(bins − 1); verdict on the common-practice thresholds 0.1 / 0.25",
          "10 bins; empty-bin floor 1e-6", "Common practice (thresholds 0.1 / 0.25 have no "
          "single published source); Yurdakul, B., WMU statistics colloquium abstract.",
          "baseline"),
    _spec("mean_shift", "drift", "Welch t of the fresh forecast errors' mean against the "
          "baseline residuals' mean", "t with Welch–Satterthwaite df, two-sided", "all rows",
          "Welch, B. L. (1947). Biometrika 34, 28-35.", "baseline"),
    _spec("variance_ratio", "drift", "s_F²/s_B²: variance of the fresh forecast errors over the "
          "baseline residual variance; Levene's test (mean-centred) in detail",
          "F(n_F − 1, n_B − 1), two-sided (sensitive to non-normality)", "all rows",
          "Snedecor & Cochran (1989), Statistical Methods, 8th ed., §6.12; Levene, H. (1960).",
          "baseline"),
    _spec("forecast_error_ratio", "drift", "RMSE of the frozen baseline coefficients on the "
          "fresh rows over the baseline's residual SD; the ratio expected without change "
          "in detail", "Chow's predictive-failure F(m, n_B − p)", "all rows",
          "Chow, G. C. (1960), second test. Econometrica 28(3), 591-605.", "baseline"),
    _spec("interval_coverage", "drift", "share of fresh rows inside the frozen model's 95 % "
          "prediction intervals", "exact two-sided binomial test against 0.95", "level 0.95",
          "e.g. Draper, N. R., Smith, H. (1998). Applied Regression Analysis, 3rd ed., §3.",
          "baseline"),
    _spec("input_drift", "drift", "the largest two-sample KS D over the model's regressors "
          "(each with its p-value and PSI in detail)", "Bonferroni over the regressors: "
          "min(1, k·min p)", "bounded samples of both windows",
          "Smirnov (1948); Bonferroni adjustment.", "baseline"),
    _spec("extrapolation", "drift", "share of fresh rows outside the baseline's range in any "
          "regressor or with leverage (under the baseline fit) above the baseline's largest",
          "none; thresholds 0.01 (warn) and 0.05 (fail) are regwarden defaults with no "
          "published source", "all rows",
          "Cook, R. D. (1979), JASA 74, 169-174 (leverage as distance from the design); "
          "thresholds: regwarden defaults.", "baseline"),
])
