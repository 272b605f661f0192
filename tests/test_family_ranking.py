"""A family's ranking, nested tests and weights against statsmodels, on datasets shipped in
packages (statsmodels 0.15 ``datasets``: grunfeld, fair, macrodata), with interactions and
categorical terms.

Every reference number below is computed at test time by statsmodels 0.15 (``smf.ols``):
``aic``, ``bic``, ``llf``, ``rsquared``, ``rsquared_adj``, ``ssr``, ``f_pvalue``,
``info_criteria("aicc", dk_params=1)`` (Hurvich–Tsai AICc, which counts the error variance),
``compare_f_test``, ``compare_lr_test`` and ``anova_lm``.  statsmodels counts K = rank for AIC
and BIC, as regwarden does, so no constant offset applies.  Tolerance 1e-9 relative, as the
issue asks.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from statsmodels.stats.anova import anova_lm

from monitor import Family
from monitor.stats.family import nested_test, support_band

RELATIVE = 1e-9


def grunfeld() -> pd.DataFrame:
    # statsmodels.datasets.grunfeld: 220 rows, 11 firms (text column 'firm')
    return sm.datasets.grunfeld.load_pandas().data


def fair() -> pd.DataFrame:
    # statsmodels.datasets.fair: 6366 rows; occupation is coded 1-6 (used as categorical)
    return sm.datasets.fair.load_pandas().data


GRUNFELD = {
    "value": "invest ~ value",
    "both": "invest ~ value + capital",
    "cross": "invest ~ value * capital",
    "firms": "invest ~ value + capital + firm",
    "by_firm": "invest ~ (value + capital) * firm",
    "through_zero": "invest ~ 0 + value + capital",
    "trend": "invest ~ value + capital + year",
}

FAIR = {
    "short": "affairs ~ rate_marriage + age",
    "family": "affairs ~ rate_marriage + age + yrs_married + children",
    "work": "affairs ~ rate_marriage * age + yrs_married + children + C(occupation)",
    "beliefs": "affairs ~ rate_marriage + age + yrs_married + children + religious + educ",
    "all": "affairs ~ rate_marriage * age + yrs_married + children + C(occupation)"
           " + religious * educ",
}

CASES = {
    "grunfeld": (grunfeld, "invest", GRUNFELD, "both"),
    "fair": (fair, "affairs", FAIR, "family"),
}


def close(ours: float, reference: float) -> bool:
    return math.isclose(ours, reference, rel_tol=RELATIVE, abs_tol=0.0)


@pytest.fixture(scope="module", params=sorted(CASES))
def evaluated(request):
    load, response, candidates, chosen = CASES[request.param]
    data = load()
    report = Family(response=response, candidates=candidates, chosen=chosen).evaluate(data)
    references = {name: smf.ols(formula, data).fit() for name, formula in candidates.items()}
    return report, references


def test_every_fit_measure_agrees_with_statsmodels(evaluated):
    report, references = evaluated
    rows = {row.name: row for row in report.ranking}
    for name, reference in references.items():
        row = rows[name]
        # statsmodels: K = df_model + k_constant = rank of the design
        assert row.n_params == int(reference.df_model + reference.k_constant)
        assert row.n == int(reference.nobs)
        pairs = {
            "log_likelihood": reference.llf, "aic": reference.aic, "bic": reference.bic,
            "aicc": reference.info_criteria("aicc", dk_params=1),
            "r_squared": reference.rsquared, "adj_r_squared": reference.rsquared_adj,
            "ss_resid": reference.ssr, "f_pvalue": reference.f_pvalue,
        }
        for field, expected in pairs.items():
            assert close(getattr(row, field), expected), (name, field, getattr(row, field),
                                                          expected)


def test_every_nested_pair_agrees_with_compare_f_test_lr_test_and_anova_lm(evaluated):
    report, references = evaluated
    assert report.nesting, "the families are built to contain nested pairs"
    for smaller, larger in report.nesting:
        ours = nested_test(report.fits[smaller], report.fits[larger])
        f_value, f_pvalue, df_f = references[larger].compare_f_test(references[smaller])
        lr_value, lr_pvalue, df_lr = references[larger].compare_lr_test(references[smaller])
        table = anova_lm(references[smaller], references[larger])
        assert ours.df == int(df_f) == int(df_lr) == int(table["df_diff"].iloc[1])
        assert close(ours.f_statistic, f_value)
        assert close(ours.f_pvalue, f_pvalue)
        assert close(ours.f_statistic, float(table["F"].iloc[1]))
        assert close(ours.f_pvalue, float(table["Pr(>F)"].iloc[1]))
        assert close(ours.ss_difference, float(table["ss_diff"].iloc[1]))
        assert close(ours.lr_statistic, lr_value)
        assert close(ours.lr_pvalue, lr_pvalue)


def test_reported_nested_tests_are_the_chosen_models_neighbours_and_agree(evaluated):
    report, references = evaluated
    chosen = report.family.chosen
    for test in report.nested:
        assert chosen in (test.smaller, test.larger) or "best_vs_chosen" in test.roles
        f_value, f_pvalue, _ = references[test.larger].compare_f_test(references[test.smaller])
        assert close(test.f_statistic, f_value) and close(test.f_pvalue, f_pvalue)


def test_weights_deltas_and_evidence_ratios_follow_the_closed_form(evaluated):
    report, references = evaluated
    names = list(references)
    aic = np.array([references[name].aic for name in names])
    # closed form (Burnham & Anderson 2002, §2.9): Δ_i = AIC_i − min AIC,
    # w_i = exp(−Δ_i/2) / Σ_j exp(−Δ_j/2), evidence ratio w_best / w_i = exp(Δ_i/2)
    delta = aic - aic.min()
    weight = np.exp(-delta / 2) / np.exp(-delta / 2).sum()
    rows = {row.name: row for row in report.ranking}
    for i, name in enumerate(names):
        assert math.isclose(rows[name].delta, delta[i], rel_tol=RELATIVE, abs_tol=1e-9)
        assert math.isclose(rows[name].weight, weight[i], rel_tol=1e-8, abs_tol=1e-300)
        if delta[i] < 1000:
            assert math.isclose(rows[name].evidence_ratio, math.exp(delta[i] / 2), rel_tol=1e-8)
    assert math.isclose(sum(row.weight for row in report.ranking), 1.0, rel_tol=1e-12)
    assert [row.name for row in report.ranking] == [names[i] for i in np.argsort(aic)]


def test_verdict_names_the_statsmodels_best_and_the_chosen_models_delta(evaluated):
    report, references = evaluated
    chosen = report.family.chosen
    best = min(references, key=lambda name: references[name].aic)
    verdict = report.verdict
    assert verdict.best == best
    assert verdict.chosen_is_best == (best == chosen)
    assert close(verdict.delta, references[chosen].aic - references[best].aic)
    assert verdict.chosen_within_margin == (verdict.delta <= 2.0)
    assert close(verdict.chosen_f_pvalue, references[chosen].f_pvalue)
    assert verdict.chosen_is_useful == (references[chosen].f_pvalue < 0.05)
    assert verdict.support == support_band(verdict.delta)[0]
    assert verdict.summary.endswith(".") and chosen in verdict.summary


def macrodata() -> pd.DataFrame:
    # statsmodels.datasets.macrodata, transformed as in METHODS.md §12.A (the Gretl/R fixture of
    # statsmodels' test_diagnostic.py): growth rates of real investment and GDP, lagged realint
    d = sm.datasets.macrodata.load_pandas().data
    return pd.DataFrame({
        "invest_growth": 400 * np.diff(np.log(d["realinv"].to_numpy())),
        "gdp_growth": 400 * np.diff(np.log(d["realgdp"].to_numpy())),
        "realint": d["realint"].to_numpy()[:-1],
    })


def test_macrodata_fixture_matches_published_and_computed_values():
    family = Family(response="invest_growth", chosen="full", candidates={
        "growth": "invest_growth ~ gdp_growth",
        "full": "invest_growth ~ gdp_growth + realint"})
    report = family.evaluate(macrodata())
    full = report.fits["full"]
    # Gretl output quoted in statsmodels regression/tests/test_glsar_gretl.py (METHODS.md §12.A):
    # log-likelihood -763.9752, AIC 1533.950, BIC 1543.875 (printed to that many digits)
    assert full.log_likelihood == pytest.approx(-763.9752, abs=5e-5)
    assert full.aic == pytest.approx(1533.950, abs=5e-4)
    assert full.bic == pytest.approx(1543.875, abs=5e-4)
    (test,) = report.nested
    # METHODS.md §2, computed with statsmodels 0.15 compare_f_test / compare_lr_test / anova_lm
    # (shared/methods_checks/i_cmp.py): F = 4.652164 (1, 199), p = 0.032213; LR = 4.667944,
    # p = 0.030731, all printed to 6 decimals
    assert (test.smaller, test.larger, test.df, test.df_resid) == ("growth", "full", 1, 199)
    assert test.f_statistic == pytest.approx(4.652164, abs=5e-7)
    assert test.f_pvalue == pytest.approx(0.032213, abs=5e-7)
    assert test.lr_statistic == pytest.approx(4.667944, abs=5e-7)
    assert test.lr_pvalue == pytest.approx(0.030731, abs=5e-7)
    assert report.verdict.chosen_is_best and report.verdict.delta == 0.0


CRITERION_OF = {
    "aic": lambda result: result.aic,
    "bic": lambda result: result.bic,
    "aicc": lambda result: result.info_criteria("aicc", dk_params=1),
}


@pytest.mark.parametrize("criterion", sorted(CRITERION_OF))
def test_the_ranking_criterion_is_selectable(criterion):
    data = grunfeld()
    report = Family(response="invest", candidates=GRUNFELD, chosen="both",
                    criterion=criterion).evaluate(data)
    values = {name: CRITERION_OF[criterion](smf.ols(formula, data).fit())
              for name, formula in GRUNFELD.items()}
    assert [row.name for row in report.ranking] == sorted(values, key=values.__getitem__)
    chosen_row = next(row for row in report.ranking if row.is_chosen)
    assert close(chosen_row.delta, values["both"] - min(values.values()))


@pytest.mark.parametrize(("delta", "code"), [
    (0.0, "substantial"), (2.0, "substantial"), (2.5, "unlabelled_2_4"), (4.0, "considerably_less"),
    (7.0, "considerably_less"), (8.0, "unlabelled_7_10"), (10.0, "unlabelled_7_10"),
    (10.5, "essentially_none"), (math.inf, "essentially_none"), (math.nan, "undefined")])
def test_support_bands_follow_burnham_and_anderson(delta, code):
    # Burnham & Anderson (2002) §2.6 p. 70, from memory (METHODS.md §2): 0-2 substantial,
    # 4-7 considerably less, > 10 essentially none; 2-4 and 7-10 unlabelled
    assert support_band(delta)[0] == code
