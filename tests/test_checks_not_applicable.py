"""Data the checks cannot use give a documented "not applicable" result, never a crash."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from checks_support import checks_by_id, run_family

from monitor.stats.checks import CHECKS, CheckResult
from monitor.stats.residual_pass import CheckOptions

ORDERED = ("durbin_watson", "breusch_godfrey", "ljung_box", "cusum")


def small_frame(n: int, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    return pd.DataFrame({"y": 1 + x + rng.normal(size=n), "x": x, "t": np.arange(float(n))})


def assert_documented(result: CheckResult) -> None:
    assert not result.applicable and result.verdict == "not_applicable"
    assert result.reason and len(result.reason) > 10
    assert result.check in CHECKS and result.reference == CHECKS[result.check].reference
    assert result.to_dict()["statistic"] is None


def test_without_a_time_column_the_order_dependent_checks_say_why():
    checks = checks_by_id(run_family(small_frame(100), ["y ~ x"]))
    for name in ORDERED:
        assert_documented(checks[name])
        assert "time column" in checks[name].reason
    assert checks["jarque_bera"].applicable


def test_rows_out_of_time_order_are_detected_across_chunk_edges():
    frame = small_frame(100)
    frame.loc[60, "t"] = 3.0          # goes back in time inside the window
    checks = checks_by_id(run_family(frame, ["y ~ x"], rows=30, time_column="t"))
    for name in ORDERED:
        assert_documented(checks[name])
        assert "row 60" in checks[name].reason
    unordered = checks_by_id(run_family(small_frame(100), ["y ~ x"], time_column="t",
                                        in_time_order=False))
    assert "does not deliver" in unordered["durbin_watson"].reason


def test_fewer_rows_than_coefficients_is_a_fit_error_before_any_check():
    from monitor.errors import ModelFitError

    with pytest.raises(ModelFitError, match="2 usable rows for 2 coefficients"):
        run_family(small_frame(2), ["y ~ x"])


@pytest.mark.parametrize("n", [3, 4, 5, 7])
def test_tiny_windows_never_crash(n):
    checks = checks_by_id(run_family(small_frame(n), ["y ~ x"], time_column="t"))
    assert set(checks) >= {c for c in CHECKS if CHECKS[c].needs in ("one window", "time order")}
    for result in checks.values():
        if not result.applicable:
            assert_documented(result)
    if n < 8:
        assert_documented(checks["dagostino_pearson"])
        assert_documented(checks["anderson_darling"])
    if n <= 4:
        assert_documented(checks["reset"])


def test_a_perfect_fit_has_constant_residuals():
    frame = small_frame(50)
    frame["y"] = 2.0 + 3.0 * frame.x
    checks = checks_by_id(run_family(frame, ["y ~ x"], time_column="t"))
    for name in ("jarque_bera", "dagostino_pearson", "shapiro_wilk", "anderson_darling",
                 "breusch_pagan", "breusch_pagan_studentized", "white", "durbin_watson",
                 "breusch_godfrey", "ljung_box", "reset", "cusum"):
        assert_documented(checks[name])
        assert "constant" in checks[name].reason or "zero" in checks[name].reason


def test_an_intercept_only_model_has_no_regressor_checks():
    checks = checks_by_id(run_family(small_frame(80), ["y ~ 1"], time_column="t"))
    for name in ("breusch_pagan", "breusch_pagan_studentized", "white", "vif"):
        assert_documented(checks[name])
    assert_documented(checks["reset"])           # constant fitted values
    assert checks["durbin_watson"].applicable and checks["cusum"].applicable


def test_white_is_skipped_with_the_reason_when_the_auxiliary_design_is_too_wide():
    rng = np.random.default_rng(2)
    columns = {f"x{i}": rng.normal(size=300) for i in range(16)}
    frame = pd.DataFrame(columns)
    frame["y"] = sum(columns.values()) + rng.normal(size=300)
    formula = "y ~ " + " + ".join(columns)
    white = checks_by_id(run_family(frame, [formula]))["white"]
    assert_documented(white)
    # 1 + 16 + 136 = 153 columns > 120
    assert "153 columns" in white.reason and "limit 120" in white.reason
    narrow = checks_by_id(run_family(frame, [formula], options=CheckOptions(
        white_max_columns=200)))["white"]
    assert narrow.applicable and narrow.df == 152


def test_a_break_date_outside_the_window_is_not_applicable():
    chow = checks_by_id(run_family(small_frame(60), ["y ~ x"], time_column="t",
                                   break_value=1000.0))["chow"]
    assert_documented(chow)
    assert "segment" in chow.reason
