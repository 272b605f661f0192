"""``regwarden compare DATA --family FAMILY.toml``: table and JSON faces, exit codes."""

from __future__ import annotations

import json
import math

import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf

from monitor.cli import main

FAMILY = '''response = "invest"
chosen = "both"
criterion = "bic"
alpha = 0.01

[candidates]
value = "invest ~ value"
both = "invest ~ value + capital"
cross = "invest ~ value * capital"
firms = "invest ~ value + capital + firm"
'''


@pytest.fixture
def files(tmp_path):
    # statsmodels.datasets.grunfeld written to CSV and Parquet
    data = sm.datasets.grunfeld.load_pandas().data
    data.to_csv(tmp_path / "grunfeld.csv", index=False)
    data.to_parquet(tmp_path / "grunfeld.parquet")
    (tmp_path / "family.toml").write_text(FAMILY, encoding="utf-8")
    return tmp_path, data


@pytest.mark.parametrize("suffix", ["csv", "parquet"])
def test_json_output_has_the_documented_keys_and_statsmodels_numbers(files, capsys, suffix):
    folder, data = files
    code = main(["compare", str(folder / f"grunfeld.{suffix}"), "--family",
                 str(folder / "family.toml"), "--format", "json"])
    assert code == 0
    output = json.loads(capsys.readouterr().out)
    ranking_keys = {"name", "n_params", "log_likelihood", "aic", "bic", "aicc", "delta", "weight",
                    "r_squared", "adj_r_squared", "ss_resid", "f_pvalue"}
    assert all(ranking_keys <= set(row) for row in output["ranking"])
    assert all({"smaller", "larger", "f_statistic", "f_pvalue", "lr_statistic", "lr_pvalue",
                "df"} <= set(test) for test in output["nested"])
    assert {"chosen", "best", "chosen_is_best", "delta", "chosen_within_margin",
            "chosen_weight", "chosen_f_pvalue", "summary"} <= set(output["verdict"])
    # reference: statsmodels 0.15 smf.ols BIC per candidate (K = rank, as ours)
    bic = {row["name"]: smf.ols(formula, data).fit().bic
           for row in output["ranking"]
           for formula in [output["family"]["candidates"][row["name"]]]}
    best = min(bic, key=bic.__getitem__)
    verdict = output["verdict"]
    assert verdict["best"] == best == output["ranking"][0]["name"]
    assert math.isclose(verdict["delta"], bic["both"] - bic[best], rel_tol=1e-9)
    assert verdict["chosen_is_best"] is (best == "both")
    assert output["family"]["alpha"] == 0.01
    assert "covariance" not in output["fits"]["both"]


def test_table_output_is_our_plain_layout(files, capsys):
    folder, _ = files
    assert main(["compare", str(folder / "grunfeld.csv"), "--family",
                 str(folder / "family.toml")]) == 0
    text = capsys.readouterr().out
    for expected in ("ranked by BIC", "ranking, best first", "nested pairs", "verdict",
                     "Burnham & Anderson", "statistical evidence, not proof", "ΔBIC"):
        assert expected in text


def test_bad_family_file_exits_2_and_missing_column_exits_3(files, capsys):
    folder, _ = files
    bad = folder / "bad.toml"
    bad.write_text(FAMILY.replace('chosen = "both"', 'chosen = "nope"'), encoding="utf-8")
    assert main(["compare", str(folder / "grunfeld.csv"), "--family", str(bad)]) == 2
    assert "chosen" in capsys.readouterr().err
    other = folder / "other.toml"
    other.write_text(FAMILY.replace("invest ~ value * capital", "invest ~ value * rain"),
                     encoding="utf-8")
    assert main(["compare", str(folder / "grunfeld.csv"), "--family", str(other)]) == 3
    assert "rain" in capsys.readouterr().err
