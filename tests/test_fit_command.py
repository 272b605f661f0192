"""``regwarden fit``: exit codes, the JSON shape, the table, and a clear error for each bad input.

Data: statsmodels' bundled stackloss (21 rows) and Longley (16 rows) written to
files in the test's temporary folder; bad inputs are made from them.  Longley's
check values are NIST's certified ones as copied into statsmodels
(``regression/tests/results/results_regression.py``).
"""

from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import monitor
from monitor.cli import main
from monitor.errors import EXIT_DATA, EXIT_OK, EXIT_USAGE

sm = pytest.importorskip("statsmodels.api")

#: issue 2: the keys of ``regwarden fit --format json``
JSON_KEYS = {"n", "df_model", "df_resid", "ss_model", "ss_resid", "ss_total", "f_statistic",
             "f_pvalue", "r_squared", "adj_r_squared", "sigma", "log_likelihood", "aic", "bic",
             "aicc", "rank", "aliased_terms", "dropped_rows", "unseen_levels", "coefficients"}
COEFFICIENT_KEYS = {"term", "estimate", "std_error", "t_statistic", "p_value", "ci_lower",
                    "ci_upper"}
FORMULA = "STACKLOSS ~ AIRFLOW * WATERTEMP + ACIDCONC"


@pytest.fixture(scope="module")
def stackloss() -> pd.DataFrame:
    return sm.datasets.stackloss.load_pandas().data


@pytest.fixture
def csv_path(stackloss: pd.DataFrame, tmp_path: Path) -> Path:
    path = tmp_path / "stackloss.csv"
    stackloss.to_csv(path, index=False)
    return path


def _parquet(frame: pd.DataFrame, tmp_path: Path, name: str = "data.parquet") -> Path:
    path = tmp_path / name
    frame.to_parquet(path, index=False)
    return path


def _run(capsys: pytest.CaptureFixture[str], *arguments: str) -> tuple[int, str, str]:
    code = main(["fit", *map(str, arguments)])
    out, err = capsys.readouterr()
    assert "Traceback" not in err and "Traceback" not in out
    return code, out, err


# -------------------------------------------------------------------------------- success


def test_json_keys_order_and_values(csv_path: Path, stackloss: pd.DataFrame,
                                    capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = _run(capsys, csv_path, "--formula", FORMULA, "--format", "json")
    assert code == EXIT_OK and err == ""
    data = json.loads(out)
    assert JSON_KEYS <= set(data), JSON_KEYS - set(data)
    assert [c["term"] for c in data["coefficients"]] == [
        "Intercept", "AIRFLOW", "WATERTEMP", "AIRFLOW:WATERTEMP", "ACIDCONC"]
    assert all(set(c) == COEFFICIENT_KEYS for c in data["coefficients"])
    assert data["n"] == 21 and data["rank"] == 5 and data["dropped_rows"] == 0
    assert data["aliased_terms"] == [] and data["unseen_levels"] == {}
    # reference: statsmodels OLS(method="qr") on the explicit design
    d = stackloss
    X = np.column_stack([np.ones(21), d.AIRFLOW, d.WATERTEMP, d.AIRFLOW * d.WATERTEMP, d.ACIDCONC])
    reference = sm.OLS(d.STACKLOSS.to_numpy(), X).fit(method="qr")
    np.testing.assert_allclose([c["estimate"] for c in data["coefficients"]], reference.params,
                               rtol=1e-9)
    np.testing.assert_allclose([c["std_error"] for c in data["coefficients"]], reference.bse,
                               rtol=1e-9)
    for key, value in (("ss_resid", reference.ssr), ("r_squared", reference.rsquared),
                       ("f_statistic", reference.fvalue), ("aic", reference.aic),
                       ("bic", reference.bic),
                       ("aicc", reference.info_criteria("aicc", dk_params=1))):
        assert data[key] == pytest.approx(value, rel=1e-9), key


def test_table_output(csv_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = _run(capsys, csv_path, "--formula", FORMULA)
    assert code == EXIT_OK and err == ""
    for text in ("R²", "AICc", "AIRFLOW:WATERTEMP", "Intercept", "21 used"):
        assert text in out
    rows = out[out.index("coefficients ("):]
    assert rows.index("AIRFLOW:WATERTEMP") < rows.index("  ACIDCONC")


def test_longley_parquet_through_the_command_meets_nist(tmp_path: Path,
                                                        capsys: pytest.CaptureFixture[str]) -> None:
    frame = sm.datasets.longley.load_pandas().data
    path = _parquet(frame, tmp_path)
    code, out, _ = _run(capsys, path, "--formula",
                        "TOTEMP ~ GNPDEFL + GNP + UNEMP + ARMED + POP + YEAR", "--format", "json")
    assert code == EXIT_OK
    data = json.loads(out)
    # certified: NIST StRD Longley via statsmodels results_regression.py (intercept first)
    certified = (-3482258.63459582, 15.0618722713733, -0.358191792925910e-01, -2.02022980381683,
                 -1.03322686717359, -0.511041056535807e-01, 1829.15146461355)
    for row, value in zip(data["coefficients"], certified, strict=True):
        # target: issue 2's table, Longley coefficients LRE >= 13.5
        assert -math.log10(abs(row["estimate"] - value) / abs(value) or 1e-16) >= 13.5


# ------------------------------------------------------------------------------ bad input


def test_missing_column(csv_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, _, err = _run(capsys, csv_path, "--formula", "STACKLOSS ~ AIRFLOW + HUMIDITY")
    assert code == EXIT_DATA
    assert "'HUMIDITY' is not in the data" in err and "AIRFLOW" in err  # lists what is there


def test_non_numeric_column(stackloss: pd.DataFrame, tmp_path: Path,
                            capsys: pytest.CaptureFixture[str]) -> None:
    frame = stackloss.assign(PLANT=["north" if i % 2 else "south" for i in range(21)])
    path = _parquet(frame, tmp_path)
    code, _, err = _run(capsys, path, "--formula", "PLANT ~ AIRFLOW")
    assert code == EXIT_DATA and "response column 'PLANT' is not numeric" in err
    code, _, err = _run(capsys, path, "--formula", "STACKLOSS ~ log(PLANT)")
    assert code == EXIT_DATA and "'PLANT' is text" in err


def test_non_finite_values_are_dropped_and_counted_or_refused_with_strict(
        stackloss: pd.DataFrame, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    frame = stackloss.copy()
    frame.loc[4, "WATERTEMP"] = np.nan
    frame.loc[9, "WATERTEMP"] = np.inf
    frame.loc[12, "ACIDCONC"] = -np.inf
    path = _parquet(frame, tmp_path)
    code, out, _ = _run(capsys, path, "--formula", FORMULA, "--format", "json")
    assert code == EXIT_OK
    data = json.loads(out)
    assert data["dropped_rows"] == 3 and data["n"] == 18
    clean = monitor.fit(stackloss.drop(index=[4, 9, 12]), FORMULA)
    assert data["ss_resid"] == pytest.approx(clean.ss_resid, rel=1e-12)
    code, out, err = _run(capsys, path, "--formula", FORMULA, "--strict")
    assert code == EXIT_DATA and out == ""
    assert "column 'WATERTEMP'" in err and "row 4" in err and "--strict" in err


def test_non_finite_values_after_a_transform_are_dropped(stackloss: pd.DataFrame, tmp_path: Path,
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    frame = stackloss.copy()
    frame.loc[2, "AIRFLOW"] = 0.0  # log(0) = -inf
    path = _parquet(frame, tmp_path)
    code, out, _ = _run(capsys, path, "--formula", "STACKLOSS ~ log(AIRFLOW)", "--format", "json")
    assert code == EXIT_OK and json.loads(out)["dropped_rows"] == 1


def test_fewer_rows_than_coefficients(stackloss: pd.DataFrame, tmp_path: Path,
                                      capsys: pytest.CaptureFixture[str]) -> None:
    path = _parquet(stackloss.head(5), tmp_path)
    code, _, err = _run(capsys, path, "--formula", FORMULA)
    assert code == EXIT_DATA
    assert "5 usable rows for 5 coefficients" in err and "at least 6" in err


def test_constant_and_duplicate_columns_are_reported_as_aliased(
        stackloss: pd.DataFrame, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    frame = stackloss.assign(PRESSURE=1.0, AIRFLOW_COPY=stackloss.AIRFLOW)
    path = _parquet(frame, tmp_path)
    code, out, err = _run(capsys, path, "--formula",
                          "STACKLOSS ~ AIRFLOW + PRESSURE + AIRFLOW_COPY + ACIDCONC",
                          "--format", "json")
    assert code == EXIT_OK
    data = json.loads(out)
    assert data["aliased_terms"] == ["PRESSURE", "AIRFLOW_COPY"] and data["rank"] == 3
    rows = {c["term"]: c for c in data["coefficients"]}
    assert rows["PRESSURE"]["estimate"] is None and rows["AIRFLOW_COPY"]["std_error"] is None
    code, out, _ = _run(capsys, path, "--formula",
                        "STACKLOSS ~ AIRFLOW + PRESSURE + AIRFLOW_COPY + ACIDCONC")
    assert code == EXIT_OK and "aliased" in out and "PRESSURE, AIRFLOW_COPY" in out


def test_empty_data(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    header_only = tmp_path / "header.csv"
    header_only.write_text("STACKLOSS,AIRFLOW\n")
    code, _, err = _run(capsys, header_only, "--formula", "STACKLOSS ~ AIRFLOW")
    assert code == EXIT_DATA and "no rows" in err
    empty_file = tmp_path / "empty.csv"
    empty_file.write_text("")
    code, _, err = _run(capsys, empty_file, "--formula", "STACKLOSS ~ AIRFLOW")
    assert code == EXIT_DATA and "empty.csv" in err


def test_missing_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, _, err = _run(capsys, tmp_path / "nowhere.parquet", "--formula", "y ~ x")
    assert code == EXIT_DATA and "no file at" in err and "nowhere.parquet" in err


@pytest.mark.parametrize(("formula", "fragment"), [
    ("STACKLOSS ~ cube(AIRFLOW)", "unknown function 'cube'"),
    ("STACKLOSS ~ AIRFLOW + + ACIDCONC", "at position 22"),
    ("STACKLOSS ~ __import__('os').getcwd()", "unexpected character"),
    ("AIRFLOW + ACIDCONC", "no response"),
])
def test_formula_problems_exit_with_usage_code(csv_path: Path, formula: str, fragment: str,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = _run(capsys, csv_path, "--formula", formula)
    assert code == EXIT_USAGE and out == ""
    assert fragment in err and err.startswith("regwarden: ")


def test_malformed_formula_shows_a_caret_under_the_problem(
        csv_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    formula = "STACKLOSS ~ (AIRFLOW + ACIDCONC"
    _, _, err = _run(capsys, csv_path, "--formula", formula)
    lines = err.splitlines()
    echoed = next(line for line in lines if line.strip() == formula)
    caret = lines[lines.index(echoed) + 1]
    assert caret.index("^") - echoed.index("S") == len(formula)


def test_usage_errors(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["fit"]) == EXIT_USAGE
    assert "Traceback" not in capsys.readouterr().err


# ------------------------------------------------------------------- the installed script


def _script() -> str:
    beside = Path(sys.executable).with_name("regwarden")
    found = str(beside) if beside.exists() else shutil.which("regwarden")
    if not found:
        pytest.fail("the regwarden console script is not installed (pip install -e .)")
    return found


def test_console_script_runs(csv_path: Path, tmp_path: Path) -> None:
    environment = {**os.environ, "PYTHONWARNINGS": "error"}
    done = subprocess.run([_script(), "fit", str(csv_path), "--formula", FORMULA, "--format",
                           "json"], capture_output=True, text=True, timeout=120, env=environment)
    assert done.returncode == EXIT_OK, done.stderr
    assert JSON_KEYS <= set(json.loads(done.stdout))
    failed = subprocess.run([_script(), "fit", str(tmp_path / "absent.csv"), "--formula", "y ~ x"],
                            capture_output=True, text=True, timeout=120, env=environment)
    assert failed.returncode == EXIT_DATA
    assert failed.stdout == "" and "Traceback" not in failed.stderr
    assert failed.stderr.startswith("regwarden: no file at")
