"""``regwarden check``: JSON shape, table, baseline, break date, exit codes."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from monitor.cli import main
from monitor.stats.checks import CHECKS

SINGLE = ["jarque_bera", "dagostino_pearson", "shapiro_wilk", "anderson_darling",
          "breusch_pagan", "breusch_pagan_studentized", "white", "durbin_watson",
          "breusch_godfrey", "ljung_box", "reset", "vif", "condition_index",
          "outlier_bonferroni", "cooks_distance", "cusum"]
DRIFT = ["chow", "coefficient_wald", "ks_residuals", "anderson_darling_ksample", "psi",
         "mean_shift", "variance_ratio", "forecast_error_ratio", "interval_coverage",
         "input_drift", "extrapolation"]


@pytest.fixture
def files(tmp_path):  # type: ignore[no-untyped-def]
    """Invented demo data: daily load against temperature (labelled invented)."""
    rng = np.random.default_rng(7)
    n = 400
    day = pd.date_range("2024-01-01", periods=n, freq="D")
    temperature = 10 + 8 * np.sin(np.arange(n) / 58) + rng.normal(size=n)
    load = 50 + 1.5 * temperature + rng.normal(size=n) + np.where(np.arange(n) > 300, 4, 0)
    frame = pd.DataFrame({"day": day, "temperature": temperature, "load": load,
                          "meter": [f"m{i:04d}" for i in range(n)]})
    frame.iloc[:200].to_parquet(tmp_path / "base.parquet")
    frame.iloc[200:].to_parquet(tmp_path / "fresh.parquet")
    frame.to_csv(tmp_path / "all.csv", index=False)
    return tmp_path


def run_json(capsys, *args):  # type: ignore[no-untyped-def]
    code = main(["check", *map(str, args), "--format", "json"])
    return code, json.loads(capsys.readouterr().out)


def test_json_lists_every_check_with_the_documented_fields(files, capsys):
    code, data = run_json(capsys, files / "fresh.parquet", "--formula", "load ~ temperature",
                          "--time-column", "day", "--key-column", "meter",
                          "--baseline", files / "base.parquet")
    assert code == 0
    ids = [c["check"] for c in data["checks"]]
    assert ids == SINGLE + DRIFT
    for check in data["checks"]:
        assert set(check) >= {"check", "statistic", "df", "p_value", "verdict", "exact",
                              "sample_size", "rows", "detail"}
        assert check["check"] in CHECKS
    by_id = {c["check"]: c for c in data["checks"]}
    assert by_id["breusch_godfrey"]["df"] == 10 and by_id["ljung_box"]["df"] == 10
    assert by_id["reset"]["df"] == [2, 196]
    # influence rows are named by the key column, not by position
    assert by_id["cooks_distance"]["detail"]["top_rows"][0]["key"].startswith("m")
    # the planted level shift after row 300 is located there (named by the key column)
    assert data["change"]["key"] in {f"m{i:04d}" for i in range(296, 305)}


def test_break_date_adds_chow_and_the_table_says_not_applicable(files, capsys):
    code, data = run_json(capsys, files / "all.csv", "--formula", "load ~ temperature",
                          "--time-column", "day", "--break-date", "2024-10-28")
    chow = {c["check"]: c for c in data["checks"]}["chow"]
    assert chow["verdict"] == "fail" and chow["df"] == [2, 396]
    code = main(["check", str(files / "all.csv"), "--formula", "load ~ temperature"])
    out = capsys.readouterr().out
    assert code == 0
    assert "n/a: no time column was given" in out
    assert "evidence, not proof" in out


def test_fail_on_sets_exit_code_one(files, capsys):
    code = main(["check", str(files / "all.csv"), "--formula", "load ~ temperature",
                 "--time-column", "day", "--fail-on", "fail"])
    capsys.readouterr()
    assert code == 1


def test_unknown_column_is_a_data_error_with_a_hint(files, capsys):
    code = main(["check", str(files / "all.csv"), "--formula", "load ~ humidity"])
    err = capsys.readouterr().err
    assert code == 3 and "humidity" in err
