"""One scan serves the whole family; every candidate equals its own direct fit; common rows."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import monitor
from monitor import CategoricalSpec, Family
from monitor.stats.family import evaluate_family, make_family_spec

CHUNK_ROWS = 40


def grunfeld_with_gaps() -> pd.DataFrame:
    # statsmodels.datasets.grunfeld (220 rows); 'year' gets 7 missing values, 'capital' 3, so
    # candidates that do not read 'year' still lose those rows under the common-rows policy
    data = sm.datasets.grunfeld.load_pandas().data.copy()
    data.loc[[3, 50, 51, 90, 140, 141, 200], "year"] = np.nan
    data.loc[[10, 50, 160], "capital"] = np.nan
    return data


CANDIDATES = {
    "value": "invest ~ value",
    "both": "invest ~ value + capital",
    "cross": "invest ~ value * capital",
    "firms": "invest ~ value + capital + firm",
    "trend": "invest ~ value + capital + year",
    "through_zero": "invest ~ 0 + value + capital",
    "by_firm": "invest ~ value * firm",
    "everything": "invest ~ value * capital + firm + year",
}


def counting_source(frame: pd.DataFrame, log: list[int]):
    """A chunk source that records every chunk it hands out (by read)."""
    columns = list(frame.columns)

    def chunks():
        log.append(0)
        for start in range(0, len(frame), CHUNK_ROWS):
            log[-1] += 1
            part = frame.iloc[start:start + CHUNK_ROWS]
            yield {c: (part[c].to_numpy(dtype=object) if part[c].dtype.kind not in "fi"
                       else part[c].to_numpy(dtype=float)) for c in columns}
    return chunks


@pytest.mark.parametrize("size", [2, 4, 8])
def test_the_rows_are_read_once_for_the_whole_family(size):
    data = grunfeld_with_gaps()
    names = list(CANDIDATES)[:size]
    # levels declared: chunks of 40 rows do not each hold every firm
    firms = CategoricalSpec(levels=tuple(sorted(set(data["firm"]))))
    spec = make_family_spec(response="invest", candidates={n: CANDIDATES[n] for n in names},
                            chosen="value", categorical={"firm": firms})
    log: list[int] = []
    report = evaluate_family(spec, counting_source(data, log), refinement_passes=1)
    chunks_in_data = math.ceil(len(data) / CHUNK_ROWS)
    # one read builds the state for every candidate, one more refines them all together
    assert log == [chunks_in_data, chunks_in_data]
    assert report.rows.data_reads == 2
    # the engine absorbed each chunk exactly once, whatever the number of candidates
    assert report.rows.chunks_absorbed == chunks_in_data
    log.clear()
    report = evaluate_family(spec, counting_source(data, log), refinement_passes=0)
    assert log == [chunks_in_data] and report.rows.data_reads == 1


def test_each_candidate_equals_a_separate_direct_fit_on_the_common_rows():
    data = grunfeld_with_gaps()
    report = Family(response="invest", candidates=CANDIDATES, chosen="both").evaluate(
        data, refinement_passes=3)
    common = data.dropna(subset=["invest", "value", "capital", "firm", "year"])
    for name, formula in CANDIDATES.items():
        direct = monitor.fit(common, formula)
        ours = report.fits[name]
        assert ours.n == direct.n == len(common)
        assert ours.terms == direct.terms
        for mine, theirs in zip(ours.coefficients, direct.coefficients, strict=True):
            assert math.isclose(mine.estimate, theirs.estimate, rel_tol=1e-10), (name, mine.term)
            assert math.isclose(mine.std_error, theirs.std_error, rel_tol=1e-10)
        for field in ("ss_resid", "ss_model", "aic", "bic", "aicc", "r_squared", "f_pvalue"):
            assert math.isclose(getattr(ours, field), getattr(direct, field), rel_tol=1e-10), \
                (name, field)


def test_each_candidate_equals_numpy_least_squares_on_the_common_rows():
    """An independent derivation: dense least squares of the same design (numpy lstsq)."""
    data = grunfeld_with_gaps()
    report = Family(response="invest", candidates=CANDIDATES, chosen="both").evaluate(data)
    common = data.dropna(subset=["invest", "value", "capital", "firm", "year"])
    y = common["invest"].to_numpy()
    designs = {
        "value": [common["value"]],
        "both": [common["value"], common["capital"]],
        "cross": [common["value"], common["capital"], common["value"] * common["capital"]],
        "trend": [common["value"], common["capital"], common["year"]],
    }
    for name, columns in designs.items():
        X = np.column_stack([np.ones(len(y)), *columns])
        beta, ssr, *_ = np.linalg.lstsq(X, y, rcond=None)
        ours = report.fits[name]
        assert np.allclose([c.estimate for c in ours.coefficients], beta, rtol=1e-10, atol=0)
        assert math.isclose(ours.ss_resid, float(ssr[0]), rel_tol=1e-10)


def test_common_rows_policy_is_reported_and_applies_to_every_candidate():
    data = grunfeld_with_gaps()
    report = Family(response="invest", candidates=CANDIDATES, chosen="both").evaluate(data)
    rows = report.rows
    # 7 missing years and 3 missing capitals, one row (50) missing both: 9 rows left out
    assert (rows.rows_read, rows.dropped_rows, rows.rows_used) == (220, 9, 211)
    assert dict(rows.dropped_by_column) == {"year": 7, "capital": 3}
    assert {fit.n for fit in report.fits.values()} == {211}
    # 'value' reads neither column: both counts came from other candidates' columns
    assert dict(rows.left_out_by_other_columns["value"]) == {"year": 7, "capital": 3}
    assert dict(rows.left_out_by_other_columns["both"]) == {"year": 7}
    assert dict(rows.left_out_by_other_columns["everything"]) == {}
    assert "common rows" in rows.policy


def test_strict_refuses_rows_that_would_be_left_out():
    data = grunfeld_with_gaps()
    with pytest.raises(monitor.DataValidationError, match="capital|year"):
        Family(response="invest", candidates=CANDIDATES, chosen="both").evaluate(
            data, strict=True)


def test_chosen_intercept_only_model_has_no_usefulness_verdict():
    data = sm.datasets.grunfeld.load_pandas().data
    report = Family(response="invest", chosen="mean", candidates={
        "mean": "invest ~ 1", "value": "invest ~ value"}).evaluate(data)
    verdict = report.verdict
    assert verdict.chosen_is_useful is None and math.isnan(verdict.chosen_f_pvalue)
    assert verdict.best == "value" and verdict.nested_direction == "best_nests_chosen"
    assert verdict.nested_rejects is True and "no slopes" in verdict.summary
    assert report.to_dict()["verdict"]["chosen_f_pvalue"] is None


def test_when_the_chosen_model_nests_the_best_the_verdict_says_so():
    # an irrelevant extra column: seeded standard normal noise added to grunfeld (invented;
    # with seed 3 it lowers the residual SS by too little to pay its AIC penalty of 2)
    data = sm.datasets.grunfeld.load_pandas().data.copy()
    data["noise"] = np.random.default_rng(3).standard_normal(len(data))
    report = Family(response="invest", chosen="padded", candidates={
        "both": "invest ~ value + capital", "padded": "invest ~ value + capital + noise"},
    ).evaluate(data)
    verdict = report.verdict
    assert verdict.best == "both" and not verdict.chosen_is_best
    assert verdict.nested_direction == "chosen_nests_best"
    assert 0 < verdict.delta <= 2.0 and verdict.chosen_within_margin
    assert verdict.support == "substantial"
    assert verdict.nested_rejects is False
    assert math.isclose(verdict.chosen_weight + verdict.best_weight, 1.0)
    assert math.isclose(verdict.evidence_ratio, math.exp(verdict.delta / 2))
    assert "within the margin" in verdict.summary


def test_aliased_columns_are_reported_as_rank_deficiency():
    data = sm.datasets.grunfeld.load_pandas().data.copy()
    data["value_twice"] = 2.0 * data["value"]
    report = Family(response="invest", chosen="both", candidates={
        "both": "invest ~ value + capital",
        "doubled": "invest ~ value + capital + value_twice"}).evaluate(data)
    row = next(r for r in report.ranking if r.name == "doubled")
    assert row.rank_deficiency == 1 and row.aliased_terms == ("value_twice",)
    assert row.n_params == 3
    (test,) = report.nested
    assert test.df == 0 and math.isnan(test.f_pvalue) and test.rejects is None


def test_report_is_plain_json_data():
    import json

    data = sm.datasets.grunfeld.load_pandas().data
    report = Family(response="invest", candidates=CANDIDATES, chosen="both").evaluate(data)
    text = json.dumps(report.to_dict(), allow_nan=False)
    again = json.loads(text)
    assert set(again) >= {"ranking", "nested", "verdict", "rows", "family", "fits", "checks"}
    assert again["family"]["candidates"] == CANDIDATES
    assert again["checks"] == {}
