"""Every check statistic and p-value against published values and reference libraries.

Sources are named above each value.  statsmodels 0.15 / scipy 1.17 are used only here,
as references; the traps listed in METHODS §14 are avoided as noted beside each call.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from checks_support import checks_by_id, relative, run_family
from scipy import integrate, stats
from statsmodels.stats import diagnostic, stattools
from statsmodels.stats.outliers_influence import OLSInfluence, variance_inflation_factor

from monitor.stats.residual_pass import CheckOptions

TIGHT = 1e-8


def macrodata_frame() -> pd.DataFrame:
    data = sm.datasets.macrodata.load_pandas().data
    return pd.DataFrame({
        "y": 400 * np.diff(np.log(data["realinv"].to_numpy())),
        "g": 400 * np.diff(np.log(data["realgdp"].to_numpy())),
        "r": data["realint"].to_numpy()[:-1],
        "t": np.arange(202.0),
    })


@pytest.fixture(scope="module")
def macro() -> dict:  # type: ignore[type-arg]
    result = run_family(macrodata_frame(), ["y ~ g + r"], rows=37, time_column="t",
                        options=CheckOptions(lags=4))
    return checks_by_id(result)


# Published values: statsmodels 0.15 stats/tests/test_diagnostic.py and
# regression/tests/test_glsar_gretl.py, which quote R lmtest / nortest / strucchange,
# Gretl and EViews on the macrodata fixture (METHODS §12 A), rounded as printed there.
@pytest.mark.parametrize(("check", "statistic", "p_value", "tolerance"), [
    # R lmtest::bptest(studentize=TRUE) (Koenker): LM 0.709924388395087, p 0.701199952134347
    ("breusch_pagan_studentized", 0.709924388395087, 0.701199952134347, 1e-9),
    # R lmtest::bptest(studentize=FALSE): LM 1.302014063483341, p 0.5215203247110649
    ("breusch_pagan", 1.302014063483341, 0.5215203247110649, 1e-9),
    # EViews White (with cross terms): 33.503722896538441, p 2.9887960597830259e-06
    ("white", 33.503722896538441, 2.9887960597830259e-06, 1e-9),
    # R lmtest::bgtest(order=4): LM 4.771042651230007, p 0.3116067133066697
    ("breusch_godfrey", 4.771042651230007, 0.3116067133066697, 1e-9),
    # R Box.test(type="Ljung", lag=4): 5.23587172795227, p 0.263940335284713
    ("ljung_box", 5.23587172795227, 0.263940335284713, 1e-9),
    # Gretl RESET (squares and cubes): F 5.219019, p 0.00619 (printed to 7 and 3 digits)
    ("reset", 5.219019, 0.00619, 1e-3),
    # R nortest::ad.test: A 1.602209621518313, p 0.000393797914936 (all 202 rows sampled)
    ("anderson_darling", 1.602209621518313, 0.000393797914936, 1e-9),
    # R strucchange efp(type="OLS-CUSUM") via sctest: 1.055750610401214, p 0.2149567397376543
    ("cusum", 1.055750610401214, 0.2149567397376543, 1e-9),
])
def test_macrodata_checks_match_published_values(macro, check, statistic, p_value, tolerance):
    result = macro[check]
    assert relative(result.statistic, statistic) < tolerance
    assert relative(result.p_value, p_value) < tolerance


def test_macrodata_durbin_watson_matches_gretl_and_imhof(macro):
    result = macro["durbin_watson"]
    # Gretl output quoted in statsmodels test_glsar_gretl.py: DW 2.213805 (6 decimals)
    assert abs(result.statistic - 2.213805) < 5e-7
    # METHODS §5.1 [C: c_dw.py, Imhof on scipy.integrate.quad]: P(d <= 2.2138) = 0.92904
    assert abs(result.p_value - 0.92904) < 5e-4
    assert abs(result.detail["p_value_negative_autocorrelation"] - 0.07096) < 5e-4


def test_macrodata_normality_matches_scipy_and_statsmodels(macro):
    frame = macrodata_frame()
    fit = sm.OLS(frame.y, sm.add_constant(frame[["g", "r"]])).fit()
    # statsmodels 0.15 stattools.jarque_bera: (JB, p, skew, kurtosis)
    jb, jb_p, _, _ = stattools.jarque_bera(fit.resid)
    assert relative(macro["jarque_bera"].statistic, jb) < TIGHT
    assert relative(macro["jarque_bera"].p_value, jb_p) < TIGHT
    # statsmodels 0.15 stattools.omni_normtest (wraps scipy.stats.normaltest)
    omnibus = stattools.omni_normtest(fit.resid)
    assert relative(macro["dagostino_pearson"].statistic, omnibus.statistic) < TIGHT
    assert relative(macro["dagostino_pearson"].p_value, omnibus.pvalue) < TIGHT
    # scipy 1.17 shapiro on all 202 residuals (the sample holds every row here)
    shapiro = stats.shapiro(fit.resid.to_numpy())
    assert macro["shapiro_wilk"].exact and macro["shapiro_wilk"].sample_size is None
    assert relative(macro["shapiro_wilk"].statistic, shapiro.statistic) < TIGHT
    assert relative(macro["shapiro_wilk"].p_value, shapiro.pvalue) < TIGHT


def test_macrodata_chow_matches_interaction_f_test():
    frame = macrodata_frame()
    result = checks_by_id(run_family(frame, ["y ~ g + r"], rows=50, time_column="t",
                                     break_value=100.0))["chow"]
    # METHODS §9 [C: e_stab.py, three routes agree]: F 2.41577 (3, 196), p 0.06773
    assert abs(result.statistic - 2.41577) < 1e-5 and result.df == (3, 196)
    # independent route: interaction model [X, X·D] vs pooled, statsmodels compare_f_test
    X = sm.add_constant(frame[["g", "r"]].to_numpy())
    D = (frame.t.to_numpy() >= 100)[:, None]
    pooled = sm.OLS(frame.y, X).fit()
    full = sm.OLS(frame.y, np.hstack([X, X * D])).fit()
    f_value, p_value, _ = full.compare_f_test(pooled)
    assert relative(result.statistic, f_value) < TIGHT
    assert relative(result.p_value, p_value) < TIGHT


def simulated_frame(seed: int, n: int = 600) -> pd.DataFrame:
    """Seeded data with heteroscedastic, autocorrelated, skewed errors and a 3-level factor."""
    rng = np.random.default_rng(seed)
    x1 = rng.normal(10.0, 3.0, n)
    x2 = rng.uniform(0.0, 5.0, n)
    group = rng.choice(["north", "south", "west"], n)
    shock = rng.standard_t(5, n) * (0.5 + 0.2 * x2)
    noise = np.empty(n)
    noise[0] = shock[0]
    for t in range(1, n):
        noise[t] = 0.3 * noise[t - 1] + shock[t]
    y = 2.0 + 0.8 * x1 - 1.5 * x2 + 0.05 * x1**2 + np.where(group == "south", 1.0, 0.0) + noise
    return pd.DataFrame({"y": y, "x1": x1, "x2": x2, "group": group,
                         "t": np.arange(float(n))})


FORMULAS = ["y ~ x1 + x2 + group", "y ~ x1", "y ~ 0 + x1 + x2", "y ~ x1 * x2"]


def design_of(frame: pd.DataFrame, formula: str) -> tuple[np.ndarray, bool]:
    """The model's design built by hand (independent of our formula code)."""
    x1, x2 = frame.x1.to_numpy(), frame.x2.to_numpy()
    south = (frame.group == "south").to_numpy(float)
    west = (frame.group == "west").to_numpy(float)
    ones = np.ones(len(frame))
    return {
        FORMULAS[0]: (np.column_stack([ones, x1, x2, south, west]), True),
        FORMULAS[1]: (np.column_stack([ones, x1]), True),
        FORMULAS[2]: (np.column_stack([x1, x2]), False),
        FORMULAS[3]: (np.column_stack([ones, x1, x2, x1 * x2]), True),
    }[formula]


@pytest.fixture(scope="module", params=[11, 12], ids=["seed11", "seed12"])
def family(request):  # type: ignore[no-untyped-def]
    frame = simulated_frame(request.param)
    result = run_family(frame, FORMULAS, rows=97, time_column="t", key_column="t")
    return frame, result


@pytest.mark.parametrize("model", range(len(FORMULAS)), ids=FORMULAS)
def test_simulated_family_matches_statsmodels_and_scipy(family, model):
    """All exact checks of every model of one family agree to 1e-8 relative."""
    frame, result = family
    checks = checks_by_id(result, model)
    X, has_intercept = design_of(frame, FORMULAS[model])
    y = frame.y.to_numpy()
    fit = sm.OLS(y, X).fit(method="qr")
    e = fit.resid
    n, p = X.shape
    with_constant = X if has_intercept else np.column_stack([np.ones(n), X])

    def agree(check, statistic, p_value=None):
        assert relative(checks[check].statistic, statistic) < TIGHT, check
        if p_value is not None:
            assert relative(checks[check].p_value, p_value) < TIGHT, check

    # statsmodels 0.15 stattools.jarque_bera / omni_normtest
    agree("jarque_bera", *stattools.jarque_bera(e)[:2])
    agree("dagostino_pearson", *stattools.omni_normtest(e))
    # statsmodels het_breuschpagan: robust=False is the original; default robust=True is
    # Koenker (METHODS §14.2); exog_het must hold a constant, so one is added without intercept
    agree("breusch_pagan", *diagnostic.het_breuschpagan(e, with_constant, robust=False)[:2])
    agree("breusch_pagan_studentized", *diagnostic.het_breuschpagan(e, with_constant)[:2])
    # statsmodels het_white (exog must contain the constant); with dummies its auxiliary
    # design repeats columns (d² = d), which statsmodels handles by pinv and warns about
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", sm.tools.sm_exceptions.SingularMatrixWarning)
        white = diagnostic.het_white(e, with_constant)
    agree("white", *white[:2])
    # statsmodels stattools.durbin_watson (statistic only)
    agree("durbin_watson", stattools.durbin_watson(e))
    # statsmodels acorr_breusch_godfrey, default nlags min(10, n // 5) = 10; result_object
    # passed to avoid the 0.15 FutureWarning (METHODS §14.5)
    with warnings.catch_warnings():  # its auxiliary design repeats the constant
        warnings.simplefilter("ignore", sm.tools.sm_exceptions.SingularMatrixWarning)
        bg = diagnostic.acorr_breusch_godfrey(fit, nlags=10, result_object=True)
    agree("breusch_godfrey", bg.lm, bg.lmpval)
    assert checks["breusch_godfrey"].df == 10
    assert relative(checks["breusch_godfrey"].detail["f_statistic"], bg.fval) < TIGHT
    # statsmodels acorr_ljungbox(lags=[10]) (demeaned, model_df=0)
    box = diagnostic.acorr_ljungbox(e, lags=[10])
    agree("ljung_box", float(box.lb_stat.iloc[0]), float(box.lb_pvalue.iloc[0]))
    # statsmodels linear_reset(power=3, use_f=True): the default use_f=False is the χ²
    # Wald form (METHODS §14.2)
    reset = diagnostic.linear_reset(fit, power=3, test_type="fitted", use_f=True)
    agree("reset", float(reset.fvalue), float(reset.pvalue))
    # statsmodels breaks_cusumolsresid(resid, ddof=p)
    cusum = diagnostic.breaks_cusumolsresid(e, ddof=p)
    agree("cusum", cusum[0], cusum[1])
    # statsmodels variance_inflation_factor (0.15 centres, standardize=True)
    slopes = [j for j in range(p) if not (has_intercept and j == 0)]
    if len(slopes) > 1 or not has_intercept:
        vif = [variance_inflation_factor(X, j) for j in slopes]
        agree("vif", max(vif))
    # BKW: numpy cond of the unit-length-scaled design (METHODS §7)
    agree("condition_index", np.linalg.cond(X / np.linalg.norm(X, axis=0)))
    # statsmodels OLSInfluence and outlier_test(method='bonf')
    influence = OLSInfluence(fit)
    external = influence.resid_studentized_external
    agree("outlier_bonferroni", np.max(np.abs(external)))
    bonferroni = fit.outlier_test(method="bonf")
    assert relative(checks["outlier_bonferroni"].p_value, float(np.min(bonferroni[:, 2]))) < TIGHT
    agree("cooks_distance", float(np.max(influence.cooks_distance[0])))
    assert relative(checks["cooks_distance"].detail["largest_leverage"],
                    float(np.max(influence.hat_matrix_diag))) < TIGHT
    counts = checks["cooks_distance"].detail["counts"]
    assert counts["cooks_above_4_over_n"] == int(np.sum(influence.cooks_distance[0] > 4 / n))
    assert counts["leverage_above_2p_over_n"] == int(
        np.sum(influence.hat_matrix_diag > 2 * p / n))
    dffits, dffits_cut = influence.dffits
    assert counts["dffits_above_2_sqrt_p_over_n"] == int(np.sum(np.abs(dffits) > dffits_cut))
    # top rows are named by the key column, in order of the measure
    top = checks["cooks_distance"].detail["top_rows"]
    order = np.argsort(-influence.cooks_distance[0])[:len(top)]
    assert [row["key"] for row in top] == frame.t.to_numpy()[order].tolist()
    # scipy 1.17 shapiro and anderson(method='interpolate') on the full residuals (n <= 5000)
    agree("shapiro_wilk", *stats.shapiro(e))
    anderson = stats.anderson(e, dist="norm", method="interpolate")
    agree("anderson_darling", anderson.statistic)
    # p-value: statsmodels normal_ad (D'Agostino & Stephens 1986 formulas)
    assert relative(checks["anderson_darling"].p_value, diagnostic.normal_ad(e)[1]) < TIGHT


def test_refinement_step_is_accumulated_in_the_same_pass(family):
    frame, result = family
    for model, formula in enumerate(FORMULAS):
        X, _ = design_of(frame, formula)
        # statsmodels OLS with method='qr' (METHODS §0.1: pinv is not an oracle)
        reference = sm.OLS(frame.y.to_numpy(), X).fit(method="qr")
        refined = result.refined_coefficients[model]
        assert np.max(np.abs(refined - reference.params) / np.abs(reference.params)) < 1e-12
        assert relative(result.refined_ssr[model], reference.ssr) < 1e-12


def test_stackloss_influence_matches_published_rows():
    data = sm.datasets.stackloss.load_pandas().data.rename(columns=str.lower)
    data["row"] = np.arange(len(data))
    checks = checks_by_id(run_family(
        data, ["stackloss ~ airflow + watertemp + acidconc"], rows=5, key_column="row"))
    outlier = checks["outlier_bonferroni"]
    # METHODS §8 [C, statsmodels OLSInfluence]: max |t*| = 3.3305 at row 20, Bonferroni p 0.0890
    assert abs(outlier.statistic - 3.3305) < 1e-4
    assert abs(outlier.p_value - 0.0890) < 1e-4
    assert outlier.detail["top_rows"][0]["key"] == 20
    cooks = checks["cooks_distance"]
    # METHODS §8: max Cook's D 0.692 at row 20; below the F(4, 17) median 0.874 -> pass
    assert abs(cooks.statistic - 0.692) < 5e-4 and cooks.detail["top_rows"][0]["key"] == 20
    assert cooks.verdict == "warn" if cooks.statistic > 0.874 else cooks.verdict == "pass"
    # METHODS §8: leverage above 2p/n = 0.381 only at row 16 (h = 0.412)
    assert cooks.detail["counts"]["leverage_above_2p_over_n"] == 1
    assert cooks.detail["top_leverage_rows"][0]["key"] == 16
    assert abs(cooks.detail["top_leverage_rows"][0]["leverage"] - 0.412) < 5e-4


def test_longley_collinearity_matches_published_values():
    data = sm.datasets.longley.load_pandas().data.rename(columns=str.lower)
    checks = checks_by_id(run_family(
        data, ["totemp ~ gnpdefl + gnp + unemp + armed + pop + year"], rows=4))
    # METHODS §7 [C: d_vif.py, statsmodels 0.15 variance_inflation_factor]: Longley VIFs
    expected = [135.532, 1788.513, 33.619, 3.589, 399.151, 758.981]
    got = list(checks["vif"].detail["terms"].values())
    assert np.allclose(got, expected, rtol=0, atol=5e-4)  # printed to 3 decimals
    assert checks["vif"].verdict == "fail"
    # METHODS §7 [C]: BKW indices 1, 9.14, 12.26, 25.34, 230.42, 1048.08, 43275
    indices = sorted(r["condition_index"] for r in checks["condition_index"].detail["indices"])
    assert np.allclose(indices, [1, 9.14, 12.26, 25.34, 230.42, 1048.08, 43275], rtol=5e-4)


def imhof_probability(eigenvalues: np.ndarray, d0: float) -> float:
    """P(d <= d0) for d = Σν_iζ_i²/Σζ_i² by Imhof (1961, Biometrika 48, 419-426)."""
    lam = eigenvalues - d0

    def integrand(u: float) -> float:
        theta = 0.5 * np.sum(np.arctan(lam * u))
        rho = np.prod((1.0 + (lam * u) ** 2) ** 0.25)
        return float(np.sin(theta) / (u * rho))

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        value, _ = integrate.quad(integrand, 0.0, np.inf, limit=500)
    return 0.5 - value / np.pi


@pytest.mark.parametrize("seed", [3, 4])
def test_durbin_watson_p_value_is_close_to_the_exact_imhof_probability(seed):
    """The beta approximation against the exact null (Imhof) at n = 50, p = 3."""
    rng = np.random.default_rng(seed)
    n = 50
    frame = pd.DataFrame({"x1": rng.normal(size=n), "x2": np.linspace(0, 1, n),
                          "t": np.arange(float(n))})
    noise = np.zeros(n)
    for t in range(1, n):
        noise[t] = 0.3 * noise[t - 1] + rng.normal()
    frame["y"] = 1 + frame.x1 + noise
    check = checks_by_id(run_family(frame, ["y ~ x1 + x2"], rows=7, time_column="t"))[
        "durbin_watson"]
    X = sm.add_constant(frame[["x1", "x2"]].to_numpy())
    M = np.eye(n) - X @ np.linalg.solve(X.T @ X, X.T)
    A = 2 * np.eye(n) - np.eye(n, k=1) - np.eye(n, k=-1)
    A[0, 0] = A[-1, -1] = 1
    nu = np.sort(np.linalg.eigvalsh(M @ A @ M))[3:]   # the n - p non-zero eigenvalues
    exact = imhof_probability(nu, check.statistic)
    # METHODS §5.1: the beta match was within 1e-4 of Imhof at n = 50; allow 2e-3
    assert abs(check.p_value - exact) < 2e-3
