"""Drift against a baseline window: the stored snapshot and the drift checks.

A :class:`BaselineSnapshot` summarises a baseline window once, from its pass 1
and pass 2: the family's least-squares state, every model's coefficients and
covariance, residual SD, residual quantile bins (exact counts), residual moments
and a bounded residual sample, and per regressor its range, bins and a bounded
sample.  It round-trips through JSON (``to_dict`` / ``from_dict``, versioned), so
later nights compare their fresh rows with it without reading the baseline rows.

On a fresh window, pass 2 computes the forecast errors ``f = y − X·b_B`` of the
frozen baseline coefficients next to each model's own residuals, in the same
matrix product.  The drift checks compare ``f`` with the baseline's own
residuals, so a shift in the mean is meaningful:

==========================  ================================================================
``coefficient_wald``        (b_B − b_F)'(V_B + V_F)⁻¹(b_B − b_F) ~ χ²(p)
``chow``                    Chow F between the baseline and fresh windows (merged states)
``ks_residuals``            two-sample KS on the bounded samples
``anderson_darling_ksample``  k-sample AD (midrank) on the same samples
``psi``                     PSI over the baseline's residual decile bins (0.1 / 0.25)
``mean_shift``              Welch t of the means (all rows)
``variance_ratio``          F test of the variances (all rows); Levene in detail
``forecast_error_ratio``    RMSE_F of the frozen model / baseline residual SD; p from
                            Chow's predictive-failure F
``interval_coverage``       share inside the frozen 95 % prediction intervals; binomial test
``input_drift``             per regressor KS (and PSI); the largest D
``extrapolation``           share of fresh rows outside the baseline's ranges or leverage
==========================  ================================================================
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import stats
from scipy.linalg import solve_triangular

from .._types import FloatArray
from ..errors import ConfigurationError
from .checks._result import (
    CHECKS,
    CheckResult,
    not_applicable,
    p_value_verdict,
    upper_verdict,
)
from .checks._stability import chow_from_states
from .engine import LeastSquaresState
from .formula import Design

if TYPE_CHECKING:
    from .residual_pass import PassTwoResult

__all__ = [
    "PSI_FAIL",
    "PSI_WARN",
    "SNAPSHOT_VERSION",
    "BaselineSnapshot",
    "ModelBaseline",
    "RegressorBaseline",
    "build_snapshot",
    "drift_checks",
    "population_stability_index",
]

#: Version of the stored snapshot shape; :meth:`BaselineSnapshot.from_dict` refuses newer ones.
SNAPSHOT_VERSION = 1
#: Common-practice PSI thresholds (no single published source; see METHODS / CHECKS["psi"]).
PSI_WARN, PSI_FAIL = 0.1, 0.25
#: Floor for empty bins in the PSI (the result depends on it; stated in every result).
PSI_FLOOR = 1e-6
#: Extrapolation share thresholds: regwarden defaults, no published source.
EXTRAPOLATION_WARN, EXTRAPOLATION_FAIL = 0.01, 0.05
PREDICTION_LEVEL = 0.95


def _tuple(values: Any) -> tuple[float, ...]:
    return tuple(float(v) for v in np.asarray(values, dtype=float).ravel())


def _matrix(values: Any) -> tuple[tuple[float, ...], ...]:
    return tuple(tuple(float(v) for v in row) for row in np.asarray(values, dtype=float))


@dataclass(frozen=True, slots=True)
class ModelBaseline:
    """What the baseline window says about one model.

    ``columns`` are indices into the family's union design columns (estimable
    ones); ``coefficients`` are in original units, intercept first;
    ``covariance`` is ``s²(X'X)⁻¹``; ``residual_edges`` are the interior edges of the
    residual quantile bins (a value ``v`` falls in bin ``searchsorted(edges, v,
    'right')``) and ``residual_proportions`` their exact shares of the baseline rows.
    """

    formula: str
    has_intercept: bool
    columns: tuple[int, ...]
    coefficients: tuple[float, ...]
    covariance: tuple[tuple[float, ...], ...]
    n: int
    ssr: float
    sigma: float
    residual_mean: float
    residual_variance: float
    residual_centre: float
    levene_sum: float
    levene_sum2: float
    residual_edges: tuple[float, ...]
    residual_proportions: tuple[float, ...]
    residual_sample: tuple[float, ...]
    max_leverage: float

    @property
    def n_parameters(self) -> int:
        return len(self.coefficients)


@dataclass(frozen=True, slots=True)
class RegressorBaseline:
    """One union design column in the baseline: range, sample-based bins, sample."""

    label: str
    minimum: float
    maximum: float
    edges: tuple[float, ...]
    proportions: tuple[float, ...]
    sample: tuple[float, ...]


@dataclass(frozen=True, slots=True)
class _PassParts:
    """What pass 2 on a fresh window needs from the snapshot, as arrays."""

    shift: FloatArray
    scale: FloatArray
    column_min: FloatArray
    column_max: FloatArray
    residual_edges: tuple[FloatArray, ...]
    own: tuple[tuple[int, ...], ...]
    own_offset: tuple[FloatArray, ...]
    inverse_triangular: tuple[FloatArray, ...]
    t_critical: FloatArray
    sigma: FloatArray
    max_leverage: FloatArray
    union_columns: tuple[tuple[int, ...], ...]
    regressor_edges: tuple[FloatArray, ...]


@dataclass(frozen=True, slots=True)
class BaselineSnapshot:
    """A versioned, JSON-serialisable summary of a baseline window of one family.

    ``window_start`` / ``window_end`` are free labels (ISO text) of the baseline
    window (half-open, as the caller defined it); ``levels`` are the frozen levels of
    the categorical columns, so a later night encodes its rows the same way.
    """

    version: int
    formulas: tuple[str, ...]
    column_labels: tuple[str, ...]
    levels: tuple[tuple[str, tuple[str, ...]], ...]
    n: int
    state_factor: tuple[tuple[float, ...], ...]
    state_shift: tuple[float, ...]
    state_scale: tuple[float, ...]
    models: tuple[ModelBaseline, ...]
    regressors: tuple[RegressorBaseline, ...]
    sample_seed: int
    window_start: str | None = None
    window_end: str | None = None

    # ------------------------------------------------------------------ storage
    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (lists and floats only)."""
        def model(m: ModelBaseline) -> dict[str, Any]:
            return {name: _listify(getattr(m, name)) for name in ModelBaseline.__slots__}

        def regressor(r: RegressorBaseline) -> dict[str, Any]:
            return {name: _listify(getattr(r, name)) for name in RegressorBaseline.__slots__}

        return {
            "version": self.version,
            "formulas": list(self.formulas),
            "column_labels": list(self.column_labels),
            "levels": {column: list(values) for column, values in self.levels},
            "n": self.n,
            "state_factor": _listify(self.state_factor),
            "state_shift": list(self.state_shift),
            "state_scale": list(self.state_scale),
            "models": [model(m) for m in self.models],
            "regressors": [regressor(r) for r in self.regressors],
            "sample_seed": self.sample_seed,
            "window_start": self.window_start,
            "window_end": self.window_end,
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> BaselineSnapshot:
        """Rebuild a snapshot stored by :meth:`to_dict`; refuses unknown newer versions."""
        version = int(data.get("version", 0))
        if version > SNAPSHOT_VERSION or version < 1:
            raise ConfigurationError(
                f"baseline snapshot version {version} is not one this regwarden reads "
                f"(it reads 1..{SNAPSHOT_VERSION})", where="baseline snapshot",
                hint="upgrade regwarden, or rebuild the baseline from its rows")
        models = tuple(ModelBaseline(
            formula=str(m["formula"]), has_intercept=bool(m["has_intercept"]),
            columns=tuple(int(c) for c in m["columns"]),
            coefficients=_tuple(m["coefficients"]), covariance=_matrix(m["covariance"]),
            n=int(m["n"]), ssr=float(m["ssr"]), sigma=float(m["sigma"]),
            residual_mean=float(m["residual_mean"]),
            residual_variance=float(m["residual_variance"]),
            residual_centre=float(m["residual_centre"]), levene_sum=float(m["levene_sum"]),
            levene_sum2=float(m["levene_sum2"]), residual_edges=_tuple(m["residual_edges"]),
            residual_proportions=_tuple(m["residual_proportions"]),
            residual_sample=_tuple(m["residual_sample"]),
            max_leverage=float(m["max_leverage"])) for m in data["models"])
        regressors = tuple(RegressorBaseline(
            label=str(r["label"]), minimum=float(r["minimum"]), maximum=float(r["maximum"]),
            edges=_tuple(r["edges"]), proportions=_tuple(r["proportions"]),
            sample=_tuple(r["sample"])) for r in data["regressors"])
        return cls(
            version=version, formulas=tuple(data["formulas"]),
            column_labels=tuple(data["column_labels"]),
            levels=tuple((str(k), tuple(str(v) for v in values))
                         for k, values in dict(data.get("levels", {})).items()),
            n=int(data["n"]), state_factor=_matrix(data["state_factor"]),
            state_shift=_tuple(data["state_shift"]), state_scale=_tuple(data["state_scale"]),
            models=models, regressors=regressors, sample_seed=int(data["sample_seed"]),
            window_start=data.get("window_start"), window_end=data.get("window_end"))

    # ------------------------------------------------------------------ use
    def state(self) -> LeastSquaresState:
        """The baseline's least-squares state over the family's union columns."""
        state = LeastSquaresState(len(self.column_labels), shift=np.array(self.state_shift),
                                  scale=np.array(self.state_scale))
        state.R = np.array(self.state_factor, dtype=float)
        state.n = self.n
        return state

    def check_compatible(self, design: Design) -> None:
        """Raise when a fresh family is not the one this baseline summarises."""
        labels = tuple(c.label for c in design.columns)
        formulas = tuple(f.text for f in design.formulas)
        if labels != self.column_labels or formulas != self.formulas:
            raise ConfigurationError(
                "the baseline snapshot was built for another family or encoding "
                f"(formulas {list(self.formulas)}, columns {list(self.column_labels)}; "
                f"fresh: {list(formulas)}, {list(labels)})",
                where="baseline snapshot",
                hint="rebuild the baseline with the same formulas, or declare the categorical "
                "levels of the baseline so the fresh rows are encoded the same way")

    def pass_parts(self, design: Design) -> _PassParts:
        """Arrays pass 2 needs (baseline working coordinates, bins, ranges)."""
        self.check_compatible(design)
        baseline_state = self.state()
        shift = np.array(self.state_shift)
        scale = np.array(self.state_scale)
        own, offsets, inverses, union_columns = [], [], [], []
        for model in self.models:
            factor = baseline_state.subset(model.columns, model.has_intercept)
            columns = list(factor.columns)
            if model.has_intercept:
                own.append((0, *(1 + c for c in columns)))
                offsets.append(np.zeros(len(columns) + 1))
            else:
                own.append(tuple(1 + c for c in columns))
                offsets.append(shift[columns] * scale[columns])
            R = factor.R
            inverses.append(solve_triangular(R, np.eye(R.shape[0]), lower=False))
            union_columns.append(tuple(columns))
        return _PassParts(
            shift=shift[:-1], scale=scale[:-1],
            column_min=np.array([r.minimum for r in self.regressors]),
            column_max=np.array([r.maximum for r in self.regressors]),
            residual_edges=tuple(np.array(m.residual_edges) for m in self.models),
            own=tuple(own), own_offset=tuple(offsets), inverse_triangular=tuple(inverses),
            t_critical=np.array([stats.t.isf((1 - PREDICTION_LEVEL) / 2, m.n - m.n_parameters)
                                 for m in self.models]),
            sigma=np.array([m.sigma for m in self.models]),
            max_leverage=np.array([m.max_leverage for m in self.models]),
            union_columns=tuple(union_columns),
            regressor_edges=tuple(np.array(r.edges) for r in self.regressors))


def _listify(value: Any) -> Any:
    if isinstance(value, tuple):
        return [_listify(v) for v in value]
    return value


def _quantile_bins(counts: np.ndarray, low: float, width: float, bins: int
                   ) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """Interior edges at grid boundaries nearest the quantiles, and exact shares."""
    total = counts.sum()
    cumulative = np.cumsum(counts)          # cumulative[i] = rows in grid cells 0..i
    chosen: list[int] = []
    for k in range(1, bins):
        # first boundary b (between cells b-1 and b of the padded grid) with share >= k/bins
        b = int(np.searchsorted(cumulative, k * total / bins, side="left")) + 1
        b = min(max(b, 1), counts.size - 1)
        if not chosen or b > chosen[-1]:
            chosen.append(b)
    edges = tuple(low + (b - 1) * width for b in chosen)
    bounds = [0, *chosen, counts.size]
    shares = tuple(float(counts[a:b].sum() / total) for a, b in zip(bounds[:-1], bounds[1:],
                                                                    strict=True))
    return edges, shares


def build_snapshot(result: PassTwoResult, *, window_start: str | None = None,
                   window_end: str | None = None) -> BaselineSnapshot:
    """Summarise a baseline window from its pass-2 result (every model of the family)."""
    state = result.state
    n = result.n
    bins = result.options.psi_bins
    models = []
    for index, factor in enumerate(result.factors):
        p = factor.n_parameters
        coefficients = (result.refined_coefficients[index] if result.refined_coefficients
                        else result.coefficients[index])
        ssr = float(result.refined_ssr[index]) if result.refined_ssr else float(
            result.sum_squares[index])
        sigma2 = ssr / (n - p) if n > p else math.nan
        covariance = sigma2 * factor.unscaled_covariance()
        edges, shares = _quantile_bins(result.grid_counts[index],
                                       float(result.grid_low[index]),
                                       float(result.grid_width[index]), bins)
        models.append(ModelBaseline(
            formula=result.design.formulas[index].text, has_intercept=factor.has_intercept,
            columns=tuple(int(c) for c in factor.columns), coefficients=_tuple(coefficients),
            covariance=_matrix(covariance), n=n, ssr=ssr, sigma=math.sqrt(sigma2),
            residual_mean=float(result.mean[index]),
            residual_variance=float(result.m2[index]) / (n - 1) if n > 1 else math.nan,
            residual_centre=float(result.residual_centre[index]),
            levene_sum=float(result.levene_sum[index]),
            levene_sum2=float(result.levene_sum2[index]),
            residual_edges=edges, residual_proportions=shares,
            residual_sample=_tuple(result.sample_residuals[:, index]),
            max_leverage=float(result.max_leverage[index])))
    regressors = []
    for j, column in enumerate(result.design.columns):
        sample = result.sample_design[:, j]
        if sample.size:
            quantiles = np.quantile(sample, np.arange(1, bins) / bins)
            edges = np.unique(quantiles)
            counts = np.bincount(np.searchsorted(edges, sample, side="right"),
                                 minlength=edges.size + 1)
            shares = counts / counts.sum()
        else:
            edges, shares = np.zeros(0), np.ones(1)
        regressors.append(RegressorBaseline(
            label=column.label, minimum=float(result.column_min[j]),
            maximum=float(result.column_max[j]), edges=_tuple(edges), proportions=_tuple(shares),
            sample=_tuple(sample)))
    assert state.shift is not None and state.scale is not None
    return BaselineSnapshot(
        version=SNAPSHOT_VERSION, formulas=tuple(f.text for f in result.design.formulas),
        column_labels=tuple(c.label for c in result.design.columns),
        levels=tuple((k, tuple(v)) for k, v in sorted(result.design.levels.items())),
        n=n, state_factor=_matrix(state.square_factor()), state_shift=_tuple(state.shift),
        state_scale=_tuple(state.scale), models=tuple(models), regressors=tuple(regressors),
        sample_seed=result.options.seed, window_start=window_start, window_end=window_end)


# ---------------------------------------------------------------------------- checks


def _ks_two_sample(first: np.ndarray, second: np.ndarray) -> Any:
    """``scipy.stats.ks_2samp`` (its 'auto' method), quiet about its documented fallback.

    scipy computes the exact p-value for small samples and warns when that
    computation does not converge and it switches to the asymptotic one; the
    fallback is the documented behaviour, not a fault, so the warning is dropped.
    """
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="ks_2samp: Exact calculation unsuccessful",
                                category=RuntimeWarning)
        return stats.ks_2samp(first, second)


def half_row_shares(counts: np.ndarray) -> np.ndarray:
    """Bin shares after adding half a row to every bin.

    PSI takes logarithms of shares, so an empty bin needs a value: a tiny floor
    (1e-6) lets one empty bin of a 90-row window dominate the index (≈ 1.3 from a
    single bin) and its χ² p-value; half a row per bin (the usual continuity
    correction of a zero cell) keeps an empty bin at the size the data can resolve.
    METHODS: "Empty bins need a floor (e.g. 1e−6, or add ½ to counts), and the
    result depends on it."
    """
    counts = np.asarray(counts, dtype=float) + 0.5
    return counts / counts.sum()


def population_stability_index(expected: np.ndarray, actual: np.ndarray,
                               floor: float = PSI_FLOOR) -> float:
    """Σ(a − e)·ln(a/e) over bins, shares floored at ``floor`` (symmetrised KL divergence)."""
    e = np.maximum(np.asarray(expected, dtype=float), floor)
    a = np.maximum(np.asarray(actual, dtype=float), floor)
    return float(np.sum((a - e) * np.log(a / e)))


def _result(result: PassTwoResult, check: str, statistic: float, df: Any, p_value: float | None,
            verdict: str, thresholds: Mapping[str, float], detail: Mapping[str, Any], *,
            exact: bool = True, sample_size: int | None = None) -> CheckResult:
    return CheckResult(check=check, statistic=float(statistic), df=df,
                       p_value=None if p_value is None else float(p_value), verdict=verdict,
                       thresholds=dict(thresholds), exact=exact, sample_size=sample_size,
                       rows=result.n, detail=dict(detail), reference=CHECKS[check].reference)


def _levels(result: PassTwoResult) -> dict[str, float]:
    return {"warn": result.options.warn_level, "fail": result.options.fail_level}


def _p_result(result: PassTwoResult, check: str, statistic: float, df: Any, p_value: float,
              detail: Mapping[str, Any], **kwargs: Any) -> CheckResult:
    levels = _levels(result)
    return _result(result, check, statistic, df, p_value,
                   p_value_verdict(p_value, levels["fail"], levels["warn"]), levels, detail,
                   **kwargs)


def drift_checks(result: PassTwoResult, model: int) -> tuple[CheckResult, ...]:
    """Every drift check of model ``model`` against ``result.baseline``."""
    baseline = result.baseline
    assert baseline is not None
    base = baseline.models[model]
    factor = result.factors[model]
    m = result.n
    ids = ("coefficient_wald", "chow", "ks_residuals", "anderson_darling_ksample", "psi",
           "mean_shift", "variance_ratio", "forecast_error_ratio", "interval_coverage",
           "input_drift", "extrapolation")
    if m < 2:
        return tuple(not_applicable(c, f"the fresh window has {m} rows; drift needs at least 2",
                                    m) for c in ids)
    if base.n <= base.n_parameters:
        return tuple(not_applicable(c, "the baseline window has no residual degrees of freedom",
                                    m) for c in ids)
    same_terms = (tuple(factor.columns) == base.columns
                  and factor.has_intercept == base.has_intercept)
    out: list[CheckResult] = []
    out.append(_wald(result, model, base, same_terms))
    out.append(_chow_between(result, model, base, same_terms))
    out.extend(_distribution(result, model, base))
    out.extend(_moments(result, model, base))
    out.append(_forecast_ratio(result, model, base))
    out.append(_coverage(result, model, base))
    out.append(_inputs(result, model))
    out.append(_extrapolation(result, model, base))
    return tuple(out)


def _wald(result: PassTwoResult, model: int, base: ModelBaseline, same: bool) -> CheckResult:
    m = result.n
    factor = result.factors[model]
    p = factor.n_parameters
    if not same:
        return not_applicable("coefficient_wald", "the model's estimable terms differ between "
                              "the baseline and the fresh window (aliasing)", m)
    if m <= p:
        return not_applicable("coefficient_wald", f"the fresh window needs more than {p} rows", m)
    fresh = (result.refined_coefficients[model] if result.refined_coefficients
             else result.coefficients[model])
    ssr = result.refined_ssr[model] if result.refined_ssr else float(result.sum_squares[model])
    V_fresh = ssr / (m - p) * factor.unscaled_covariance()
    V = np.array(base.covariance) + V_fresh
    difference = np.array(base.coefficients) - fresh
    try:
        chol = np.linalg.cholesky(V)
    except np.linalg.LinAlgError:
        return not_applicable("coefficient_wald", "the summed covariance is singular", m)
    z = solve_triangular(chol, difference, lower=True)
    statistic = float(z @ z)
    labels = (["Intercept"] if factor.has_intercept else []) + [
        result.design.columns[c].label for c in factor.columns]
    per_term = {label: {"baseline": float(b), "fresh": float(f),
                        "z": float((b - f) / math.sqrt(V[i, i]))}
                for i, (label, b, f) in enumerate(zip(labels, base.coefficients, fresh,
                                                      strict=True))}
    df2 = base.n + m - 2 * p
    detail = {"terms": per_term, "f_form": statistic / p, "f_df": [p, df2],
              "f_p_value": float(stats.f.sf(statistic / p, p, df2)) if df2 > 0 else None,
              "assumes": "independent windows; each covariance s²(X'X)⁻¹"}
    return _p_result(result, "coefficient_wald", statistic, p, float(stats.chi2.sf(statistic, p)),
                     detail)


def _pooled_ssr(result: PassTwoResult, base: ModelBaseline) -> tuple[float, LeastSquaresState]:
    baseline_state = result.baseline.state()  # type: ignore[union-attr]
    pooled = baseline_state.merge(result.state)
    factor = pooled.subset(base.columns, base.has_intercept)
    return factor.ssr, baseline_state


def _chow_between(result: PassTwoResult, model: int, base: ModelBaseline, same: bool
                  ) -> CheckResult:
    m = result.n
    if not same:
        return not_applicable("chow", "the model's estimable terms differ between windows", m)
    pooled, baseline_state = _pooled_ssr(result, base)
    outcome = chow_from_states(pooled, baseline_state, result.state, base.columns,
                               base.has_intercept, base.n_parameters)
    if isinstance(outcome, str):
        return not_applicable("chow", outcome, m)
    statistic, df, p_value, detail = outcome
    detail = {"break": "between the baseline and the fresh window",
              "assumes": "equal error variance in both windows", **detail}
    return _p_result(result, "chow", statistic, df, p_value, detail)


def _samples(result: PassTwoResult, model: int, base: ModelBaseline
             ) -> tuple[np.ndarray, np.ndarray, bool]:
    fresh = result.sample_frozen[:, model] if result.sample_frozen.size else np.zeros(0)
    baseline = np.array(base.residual_sample)
    complete = result.sample_is_complete and baseline.size == base.n
    return baseline, fresh, complete


def _distribution(result: PassTwoResult, model: int, base: ModelBaseline) -> list[CheckResult]:
    m = result.n
    baseline, fresh, complete = _samples(result, model, base)
    out: list[CheckResult] = []
    sizes = {"baseline_sample_rows": int(baseline.size), "fresh_sample_rows": int(fresh.size),
             "sample_seed": result.options.seed,
             "compares": "frozen baseline model's forecast errors on the fresh rows with the "
                         "baseline's own residuals"}
    sample_size = None if complete else int(fresh.size)
    if baseline.size < 1 or fresh.size < 1:
        out.append(not_applicable("ks_residuals", "a sample is empty", m))
        out.append(not_applicable("anderson_darling_ksample", "a sample is empty", m))
    else:
        ks = _ks_two_sample(baseline, fresh)
        out.append(_p_result(result, "ks_residuals", ks.statistic, None, ks.pvalue,
                             {**sizes, "effect_size_note": "with large samples a negligible D "
                              "is significant; read D as an effect size too"},
                             exact=complete, sample_size=sample_size))
        if np.unique(np.concatenate([baseline, fresh])).size < 2:
            out.append(not_applicable("anderson_darling_ksample", "all sampled values are equal",
                                      m))
        else:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # scipy warns when it floors/caps the p-value
                ad = stats.anderson_ksamp([baseline, fresh], variant="midrank")
            note = ("p-value interpolated from Scholz & Stephens' table; floored at 0.001 and "
                    "capped at 0.25")
            out.append(_p_result(result, "anderson_darling_ksample", ad.statistic, None,
                                 ad.pvalue, {**sizes, "note": note}, exact=complete,
                                 sample_size=sample_size))
    counts = result.frozen_bins[model]
    expected = np.array(base.residual_proportions)
    actual = counts / counts.sum()
    psi = population_stability_index(half_row_shares(expected * base.n),
                                     half_row_shares(counts))
    bins = expected.size
    scale = 1.0 / base.n + 1.0 / m
    p_approx = float(stats.chi2.sf(psi / scale, bins - 1)) if bins > 1 else math.nan
    out.append(_result(
        result, "psi", psi, bins - 1, p_approx, upper_verdict(psi, PSI_WARN, PSI_FAIL),
        {"warn": PSI_WARN, "fail": PSI_FAIL},
        {"bins": bins, "baseline_shares": expected.tolist(), "fresh_shares": actual.tolist(),
         "edges": list(base.residual_edges),
         "empty_bins": "half a row is added to every bin of both windows, so an empty bin "
                       "counts as half a row",
         "thresholds_source": "common practice, no single published source; small windows "
                              "cross 0.1 by chance, large ones on trivial shifts",
         "p_value_method": "approximation PSI/(1/n + 1/m) ~ χ²(bins − 1) "
                           "(Yurdakul) [from memory]"}))
    return out


def _moments(result: PassTwoResult, model: int, base: ModelBaseline) -> list[CheckResult]:
    m = result.n
    n_b = base.n
    mean_f = float(result.frozen_mean[model])
    var_f = float(result.frozen_m2[model]) / (m - 1)
    mean_b, var_b = base.residual_mean, base.residual_variance
    out = []
    v_f, v_b = var_f / m, var_b / n_b
    if v_f + v_b <= 0:
        out.append(not_applicable("mean_shift", "both windows have constant errors", m))
    else:
        t = (mean_f - mean_b) / math.sqrt(v_f + v_b)
        df = (v_f + v_b) ** 2 / (v_f**2 / (m - 1) + v_b**2 / (n_b - 1))
        out.append(_p_result(result, "mean_shift", t, df, float(2 * stats.t.sf(abs(t), df)),
                             {"fresh_mean": mean_f, "baseline_mean": mean_b,
                              "difference": mean_f - mean_b,
                              "difference_in_baseline_sds": (mean_f - mean_b) / base.sigma}))
    if var_b <= 0 or var_f <= 0:
        out.append(not_applicable("variance_ratio", "a window has constant errors", m))
        return out
    ratio = var_f / var_b
    df_pair = (m - 1, n_b - 1)
    p_value = float(min(1.0, 2 * min(stats.f.cdf(ratio, *df_pair), stats.f.sf(ratio, *df_pair))))
    # Levene (mean-centred): one-way ANOVA on |x − group mean|
    z_b = base.levene_sum / n_b
    z_f = float(result.frozen_levene_sum[model]) / m
    z_all = (base.levene_sum + float(result.frozen_levene_sum[model])) / (n_b + m)
    between = n_b * (z_b - z_all) ** 2 + m * (z_f - z_all) ** 2
    within = (base.levene_sum2 - n_b * z_b**2) + (float(result.frozen_levene_sum2[model])
                                                   - m * z_f**2)
    levene = (n_b + m - 2) * between / within if within > 0 else math.nan
    detail = {"fresh_variance": var_f, "baseline_variance": var_b,
              "levene_statistic": levene, "levene_df": [1, n_b + m - 2],
              "levene_p_value": float(stats.f.sf(levene, 1, n_b + m - 2)),
              "note": "the F test is very sensitive to non-normal errors; Levene's is not"}
    out.append(_p_result(result, "variance_ratio", ratio, df_pair, p_value, detail))
    return out


def _forecast_ratio(result: PassTwoResult, model: int, base: ModelBaseline) -> CheckResult:
    m = result.n
    rmse = math.sqrt(float(result.frozen_sum_squares[model]) / m)
    ratio = rmse / base.sigma if base.sigma > 0 else math.inf
    expected = math.sqrt(1.0 + float(result.baseline_leverage_sum[model]) / m)
    pooled, _ = _pooled_ssr(result, base)
    df2 = base.n - base.n_parameters
    statistic = ((pooled - base.ssr) / m) / (base.ssr / df2)
    p_value = float(stats.f.sf(statistic, m, df2))
    detail = {"fresh_rmse": rmse, "baseline_sigma": base.sigma,
              "expected_ratio_without_change": expected,
              "predictive_chow_f": statistic, "predictive_chow_df": [m, df2],
              "note": "compare the ratio with the expected one, not with 1"}
    return _p_result(result, "forecast_error_ratio", ratio, (m, df2), p_value, detail)


def _coverage(result: PassTwoResult, model: int, base: ModelBaseline) -> CheckResult:
    m = result.n
    covered = int(result.covered[model])
    test = stats.binomtest(covered, m, PREDICTION_LEVEL)
    detail = {"level": PREDICTION_LEVEL, "covered_rows": covered,
              "coverage": covered / m, "interval": "ŷ ± t(0.975, n_B − p)·s_B·√(1 + h₀)"}
    return _p_result(result, "interval_coverage", covered / m, None, float(test.pvalue), detail)


def _inputs(result: PassTwoResult, model: int) -> CheckResult:
    m = result.n
    baseline = result.baseline
    assert baseline is not None
    columns = list(result.layouts[model].union_columns)
    if not columns:
        return not_applicable("input_drift", "the model has no regressors", m)
    per: dict[str, Any] = {}
    largest, smallest_p = -1.0, 1.0
    for j in columns:
        reg = baseline.regressors[j]
        base_sample = np.array(reg.sample)
        fresh_sample = result.sample_design[:, j]
        if base_sample.size == 0 or fresh_sample.size == 0:
            continue
        ks = _ks_two_sample(base_sample, fresh_sample)
        counts = result.regressor_bins[j]
        psi = population_stability_index(
            half_row_shares(np.array(reg.proportions) * baseline.n), half_row_shares(counts))
        per[reg.label] = {"ks_statistic": float(ks.statistic), "ks_p_value": float(ks.pvalue),
                          "psi": psi, "fresh_mean": float(fresh_sample.mean()),
                          "baseline_mean": float(base_sample.mean())}
        largest = max(largest, float(ks.statistic))
        smallest_p = min(smallest_p, float(ks.pvalue))
    if not per:
        return not_applicable("input_drift", "the samples are empty", m)
    p_value = min(1.0, len(per) * smallest_p)
    complete = result.sample_is_complete and all(
        len(baseline.regressors[j].sample) == baseline.n for j in columns)
    return _p_result(result, "input_drift", largest, None, p_value,
                     {"regressors": per, "p_value_method": "Bonferroni over the regressors",
                      "psi_note": "baseline regressor bins are sample-based"},
                     exact=complete, sample_size=None if complete else int(
                         result.sample_design.shape[0]))


def _extrapolation(result: PassTwoResult, model: int, base: ModelBaseline) -> CheckResult:
    m = result.n
    share = int(result.outside_either[model]) / m
    detail = {"share_outside_ranges": int(result.outside_range[model]) / m,
              "share_beyond_baseline_leverage": int(result.beyond_leverage[model]) / m,
              "rows_flagged": int(result.outside_either[model]),
              "baseline_largest_leverage": base.max_leverage,
              "thresholds_source": "regwarden defaults, no published source"}
    return _result(result, "extrapolation", share, None, None,
                   upper_verdict(share, EXTRAPOLATION_WARN, EXTRAPOLATION_FAIL),
                   {"warn": EXTRAPOLATION_WARN, "fail": EXTRAPOLATION_FAIL}, detail)
