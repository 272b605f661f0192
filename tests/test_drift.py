"""Baseline snapshots and the drift checks, against scipy/statsmodels and published values."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from checks_support import relative
from scipy import stats

from monitor import BaselineSnapshot, build_baseline, check_data
from monitor.errors import ConfigurationError
from monitor.stats.drift import population_stability_index
from monitor.stats.residual_pass import CheckOptions

TIGHT = 1e-8


def macrodata_frame() -> pd.DataFrame:
    data = sm.datasets.macrodata.load_pandas().data
    return pd.DataFrame({
        "y": 400 * np.diff(np.log(data["realinv"].to_numpy())),
        "g": 400 * np.diff(np.log(data["realgdp"].to_numpy())),
        "r": data["realint"].to_numpy()[:-1], "t": np.arange(202.0)})


def test_macrodata_split_matches_published_wald_and_chow():
    frame = macrodata_frame()
    report = check_data(frame.iloc[100:], "y ~ g + r", baseline=frame.iloc[:100], chunk_rows=17)
    # METHODS §9 [C: e_stab.py]: Wald split at 100: W 7.4032, p 0.0601
    wald = report.check("coefficient_wald")
    assert abs(wald.statistic - 7.4032) < 1e-4 and abs(wald.p_value - 0.0601) < 1e-4
    # METHODS §9 [C: e_stab.py, three routes agree]: Chow F 2.41577 (3, 196), p 0.06773
    chow = report.check("chow")
    assert abs(chow.statistic - 2.41577) < 1e-5 and chow.df == (3, 196)


def windows(seed: int, shift: float = 0.0, scale: float = 1.0) -> tuple[pd.DataFrame, ...]:
    rng = np.random.default_rng(seed)

    def window(n: int, x_mean: float, shift_: float, scale_: float, start: int) -> pd.DataFrame:
        x1 = rng.normal(x_mean, 1.0, n)
        x2 = rng.uniform(0, 4, n)
        y = 1.0 + 2.0 * x1 - 0.5 * x2 + shift_ + scale_ * rng.normal(size=n)
        return pd.DataFrame({"y": y, "x1": x1, "x2": x2, "t": np.arange(start, start + n,
                                                                        dtype=float)})
    return window(700, 0.0, 0.0, 1.0, 0), window(400, 0.3, shift, scale, 700)


@pytest.fixture(scope="module")
def drifted():  # type: ignore[no-untyped-def]
    baseline, fresh = windows(31, shift=0.15, scale=1.2)
    report = check_data(fresh, "y ~ x1 + x2", baseline=baseline, time_column="t",
                        chunk_rows=64, options=CheckOptions(sample_size=5000))
    return baseline, fresh, {c.check: c for c in report.checks}


def frozen_errors(baseline: pd.DataFrame, fresh: pd.DataFrame):  # type: ignore[no-untyped-def]
    X1 = sm.add_constant(baseline[["x1", "x2"]].to_numpy())
    X2 = sm.add_constant(fresh[["x1", "x2"]].to_numpy())
    fit = sm.OLS(baseline.y.to_numpy(), X1).fit(method="qr")
    return fit, X1, X2, fresh.y.to_numpy() - X2 @ fit.params


def test_distribution_drift_matches_scipy_on_complete_samples(drifted):
    baseline, fresh, checks = drifted
    fit, _, _, f = frozen_errors(baseline, fresh)
    e = fit.resid
    # samples hold every row here, so the sample-based tests are exact
    assert checks["ks_residuals"].exact and checks["ks_residuals"].sample_size is None
    # scipy 1.17 ks_2samp(method='auto') on all baseline residuals and fresh forecast errors
    ks = stats.ks_2samp(e, f)
    assert relative(checks["ks_residuals"].statistic, ks.statistic) < TIGHT
    assert relative(checks["ks_residuals"].p_value, ks.pvalue) < TIGHT
    # scipy 1.17 anderson_ksamp(variant='midrank') (variant passed: METHODS §14.5)
    with pytest.warns(UserWarning, match="floored"):   # the table's p floor, 0.001
        ad = stats.anderson_ksamp([e, f], variant="midrank")
    assert relative(checks["anderson_darling_ksample"].statistic, ad.statistic) < TIGHT
    assert relative(checks["anderson_darling_ksample"].p_value, ad.pvalue) < TIGHT
    # scipy ttest_ind(equal_var=False): Welch t and its Welch–Satterthwaite df
    welch = stats.ttest_ind(f, e, equal_var=False)
    assert relative(checks["mean_shift"].statistic, welch.statistic) < TIGHT
    assert relative(checks["mean_shift"].p_value, welch.pvalue) < TIGHT
    assert relative(checks["mean_shift"].df, welch.df) < TIGHT
    # variance ratio: F = s_F²/s_B² against scipy.stats.f (no scipy function for the test)
    ratio = np.var(f, ddof=1) / np.var(e, ddof=1)
    df = (len(f) - 1, len(e) - 1)
    two_sided = 2 * min(stats.f.cdf(ratio, *df), stats.f.sf(ratio, *df))
    assert relative(checks["variance_ratio"].statistic, ratio) < TIGHT
    assert relative(checks["variance_ratio"].p_value, two_sided) < TIGHT
    # scipy levene(center='mean') (the default 'median' is Brown–Forsythe)
    levene = stats.levene(e, f, center="mean")
    assert relative(checks["variance_ratio"].detail["levene_statistic"], levene.statistic) < 1e-8
    assert relative(checks["variance_ratio"].detail["levene_p_value"], levene.pvalue) < 1e-8


def test_psi_uses_the_baseline_quantile_bins_with_exact_counts(drifted):
    baseline, fresh, checks = drifted
    fit, _, _, f = frozen_errors(baseline, fresh)
    psi = checks["psi"]
    edges = np.array(psi.detail["edges"])
    base_counts = np.bincount(np.searchsorted(edges, fit.resid, side="right"),
                              minlength=edges.size + 1)
    fresh_counts = np.bincount(np.searchsorted(edges, f, side="right"), minlength=edges.size + 1)
    p_base, p_fresh = base_counts / base_counts.sum(), fresh_counts / fresh_counts.sum()
    assert np.allclose(psi.detail["baseline_shares"], p_base, atol=1e-15)
    assert np.allclose(psi.detail["fresh_shares"], p_fresh, atol=1e-15)
    # decile bins: each baseline share is 10 % up to the grid resolution
    assert np.all(np.abs(p_base - 0.1) < 0.01)
    # METHODS §10 [C]: PSI equals entropy(pF, pB) + entropy(pB, pF), here of the shares with
    # half a row added to every bin (METHODS §10: "or add ½ to counts")
    h_base = (base_counts + 0.5) / (base_counts + 0.5).sum()
    h_fresh = (fresh_counts + 0.5) / (fresh_counts + 0.5).sum()
    expected = stats.entropy(h_fresh, h_base) + stats.entropy(h_base, h_fresh)
    assert relative(psi.statistic, expected) < 1e-10
    assert psi.thresholds == {"warn": 0.1, "fail": 0.25}


def test_frozen_model_forecast_checks_match_direct_formulas(drifted):
    baseline, fresh, checks = drifted
    fit, X1, X2, f = frozen_errors(baseline, fresh)
    m, n, p = len(f), len(baseline), 3
    # forecast-error ratio: RMSE_F / s_B by hand
    ratio = np.sqrt(np.mean(f**2)) / np.sqrt(fit.ssr / (n - p))
    assert relative(checks["forecast_error_ratio"].statistic, ratio) < TIGHT
    # Chow predictive failure, METHODS §9: (SSR_pooled − SSR_1) = f'(I + X2(X1'X1)⁻¹X2')⁻¹f
    G = np.linalg.inv(X1.T @ X1)
    quadratic = f @ np.linalg.solve(np.eye(m) + X2 @ G @ X2.T, f)
    F = (quadratic / m) / (fit.ssr / (n - p))
    detail = checks["forecast_error_ratio"].detail
    assert relative(detail["predictive_chow_f"], F) < 1e-8
    assert relative(checks["forecast_error_ratio"].p_value, stats.f.sf(F, m, n - p)) < 1e-7
    # interval coverage: statsmodels get_prediction(...).conf_int(obs=True) 95 % intervals
    lower, upper = fit.get_prediction(X2).conf_int(obs=True, alpha=0.05).T
    covered = int(np.sum((fresh.y.to_numpy() >= lower) & (fresh.y.to_numpy() <= upper)))
    assert checks["interval_coverage"].detail["covered_rows"] == covered
    # exact binomial test, scipy.stats.binomtest
    assert relative(checks["interval_coverage"].p_value,
                    stats.binomtest(covered, m, 0.95).pvalue) < 1e-12
    # extrapolation: outside the baseline ranges, or leverage beyond the baseline's largest
    h_base = np.einsum("ij,jk,ik->i", X1, G, X1)
    h_fresh = np.einsum("ij,jk,ik->i", X2, G, X2)
    outside = ((fresh[["x1", "x2"]] < baseline[["x1", "x2"]].min()) |
               (fresh[["x1", "x2"]] > baseline[["x1", "x2"]].max())).any(axis=1).to_numpy()
    flagged = outside | (h_fresh > h_base.max())
    assert checks["extrapolation"].statistic == pytest.approx(flagged.mean(), abs=1e-15)


def test_input_drift_names_each_regressor(drifted):
    baseline, fresh, checks = drifted
    drift = checks["input_drift"]
    assert set(drift.detail["regressors"]) == {"x1", "x2"}
    # scipy ks_2samp per regressor (complete samples)
    ks = stats.ks_2samp(baseline.x1, fresh.x1)
    assert relative(drift.detail["regressors"]["x1"]["ks_statistic"], ks.statistic) < TIGHT
    # x1's mean moved by 0.3 SD: the largest D is x1's and the Bonferroni p is small
    assert drift.statistic == drift.detail["regressors"]["x1"]["ks_statistic"]
    assert drift.p_value == pytest.approx(min(1.0, 2 * ks.pvalue), rel=1e-8)


def test_snapshot_round_trips_through_json_and_gives_the_same_checks():
    baseline, fresh = windows(41, shift=0.3)
    options = CheckOptions(sample_size=300)
    snapshot = build_baseline(baseline, "y ~ x1 + x2", time_column="t", chunk_rows=100,
                              options=options, window_start="2024-01-01",
                              window_end="2024-03-01")
    stored = json.dumps(snapshot.to_dict(), allow_nan=False)
    restored = BaselineSnapshot.from_dict(json.loads(stored))
    assert restored == snapshot
    from_snapshot = check_data(fresh, "y ~ x1 + x2", baseline=restored, time_column="t",
                               options=options)
    from_rows = check_data(fresh, "y ~ x1 + x2", baseline=baseline, time_column="t",
                           options=options)
    for a, b in zip(from_snapshot.checks, from_rows.checks, strict=True):
        assert a.check == b.check
        assert a.statistic == pytest.approx(b.statistic, rel=1e-9, nan_ok=True), a.check
    # the planted 0.3 SD shift is found
    assert from_snapshot.check("mean_shift").verdict == "fail"


def test_newer_snapshot_versions_are_refused_with_a_hint():
    baseline, _ = windows(5)
    data = build_baseline(baseline, "y ~ x1 + x2", options=CheckOptions(sample_size=50)).to_dict()
    data["version"] = 99
    with pytest.raises(ConfigurationError, match="version 99"):
        BaselineSnapshot.from_dict(data)


def test_a_snapshot_of_another_family_is_refused():
    baseline, fresh = windows(6)
    snapshot = build_baseline(baseline, "y ~ x1", options=CheckOptions(sample_size=50))
    with pytest.raises(ConfigurationError, match="another family"):
        check_data(fresh, "y ~ x1 + x2", baseline=snapshot)


def test_an_empty_fresh_bin_counts_as_half_a_row_not_as_a_tiny_floor():
    """One empty decile in a 90-row window: the floor 1e-6 would give PSI > 1 on its own."""
    from monitor.stats.drift import half_row_shares

    fresh = np.array([9, 9, 9, 9, 9, 9, 9, 9, 18, 0])
    baseline = np.full(10, 36.5)
    psi = population_stability_index(half_row_shares(baseline), half_row_shares(fresh))
    floored = population_stability_index(baseline / baseline.sum(), fresh / fresh.sum())
    # METHODS §10 [C]: PSI = entropy(pF, pB) + entropy(pB, pF), here with half a row added
    # to each bin: scipy.stats.entropy on (counts + 0.5) gives 0.3420869601452423; with the
    # 1e-6 floor the same shares give 1.2205957516275525 (computed by hand from the formula)
    shares_fresh, shares_base = (fresh + 0.5) / (fresh + 0.5).sum(), np.full(10, 0.1)
    expected = stats.entropy(shares_fresh, shares_base) + stats.entropy(shares_base,
                                                                        shares_fresh)
    assert abs(psi - expected) <= 1e-12 * expected
    assert abs(psi - 0.3420869601452423) <= 1e-12
    assert abs(floored - 1.2205957516275525) <= 1e-12


def test_population_stability_index_floors_empty_bins():
    # by hand: bins (0.5, 0.5) vs (1, 0): floor 1e-6 in the empty bin
    value = population_stability_index(np.array([0.5, 0.5]), np.array([1.0, 0.0]))
    expected = (1 - 0.5) * np.log(1 / 0.5) + (1e-6 - 0.5) * np.log(1e-6 / 0.5)
    assert value == pytest.approx(expected, rel=1e-12)
