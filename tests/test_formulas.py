"""Formulas: parsing, term order and labels, categorical coding, unseen levels, no code execution.

Expected structures follow Wilkinson & Rogers (1973), "Symbolic description of
factorial models for analysis of variance", Applied Statistics 22(3), 392-399
(``a*b`` = ``a + b + a:b``; ``-`` removes a term) and issue 2's label and coding
rules (intercept first, ``name[level]``, levels sorted, reference first unless
declared, encoding frozen, unseen levels counted and never coded as zeros).
Data: datasets shipped in statsmodels (grunfeld's text column ``firm``, fair's
numeric codes).
"""

from __future__ import annotations

import builtins
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

import monitor
from monitor.errors import DataValidationError, FormulaError, RegwardenError
from monitor.stats.fitting import pass_one
from monitor.stats.formula import CategoricalSpec, build_design, parse_formula

sm = pytest.importorskip("statsmodels.api")


def _terms(formula: str) -> list[str]:
    return [":".join(f.label for f in term) for term in parse_formula(formula).terms]


# ------------------------------------------------------------------------------ parsing


@pytest.mark.parametrize(("formula", "terms", "intercept"), [
    ("y ~ a*b", ["a", "b", "a:b"], True),
    ("y ~ a + b + a:b", ["a", "b", "a:b"], True),
    ("y ~ a:b + a", ["a:b", "a"], True),  # formula order is kept, not re-sorted
    ("y ~ (a + b):c", ["a:c", "b:c"], True),
    ("y ~ a*b - a", ["b", "a:b"], True),
    ("y ~ x + x", ["x"], True),
    ("y ~ x - 1", ["x"], False),
    ("y ~ x + 0", ["x"], False),
    ("y ~ 0 + x", ["x"], False),
    ("y ~ 1 + x - 1 + 0", ["x"], False),
    ("y ~ I(x**2) + I( x ^ 3 ) + log( x ) + sqrt(x)", ["I(x**2)", "I(x**3)", "log(x)", "sqrt(x)"],
     True),
    ("y ~ `my col` + z", ["my col", "z"], True),
    ("log(y) ~ x", ["x"], True),
])
def test_terms_intercept_and_labels(formula: str, terms: list[str], intercept: bool) -> None:
    parsed = parse_formula(formula)
    assert _terms(formula) == terms
    assert parsed.has_intercept is intercept


def test_columns_response_first_without_repeats() -> None:
    parsed = parse_formula("log(load) ~ temp*wind + I(temp**2) + C(day)")
    assert parsed.response.label == "log(load)"
    assert parsed.columns == ("load", "temp", "wind", "day")


@pytest.mark.parametrize(("formula", "position", "fragment"), [
    ("y ~ x + + z", 8, "unexpected '+'"),
    ("y ~ (x + z", 10, "expected ')'"),
    ("y ~ x + log(", 12, "found the end"),
    ("y ~ x; z", 5, "unexpected character ';'"),
    ("y ~ x z", 6, "unexpected 'z'"),
    ("~ x", 0, "no response"),
    ("y ~", 3, "nothing after '~'"),
    ("y ~ 3", 4, "bare number"),
])
def test_malformed_formulas_name_the_position(formula: str, position: int, fragment: str) -> None:
    with pytest.raises(FormulaError) as caught:
        parse_formula(formula)
    error = caught.value
    assert error.position == position
    assert fragment in str(error)
    assert f"at position {position}" in error.where
    # the caret line points at the position under the echoed formula
    lines = str(error).splitlines()
    assert lines[1].strip() == formula and lines[2].index("^") - lines[1].index(formula[0]) == position


@pytest.mark.parametrize("formula", ["x + z", "", "   "])
def test_no_response_or_empty(formula: str) -> None:
    with pytest.raises(FormulaError, match="no response|empty"):
        parse_formula(formula)


@pytest.mark.parametrize(("formula", "name"), [
    ("y ~ eval(x)", "eval"),
    ("y ~ foo(x) + z", "foo"),
    ("y ~ I(exec(x))", "exec"),
])
def test_unknown_function_is_refused_and_named(formula: str, name: str) -> None:
    with pytest.raises(FormulaError, match=f"unknown function '{name}'") as caught:
        parse_formula(formula)
    assert caught.value.position == formula.index(name)
    assert "log" in caught.value.hint  # lists the allowed functions


# ------------------------------------------------------------------- no code execution

CODE_ATTEMPTS = [
    "y ~ __import__('os').system('touch {marker}')",
    "y ~ I(__import__('os').system('touch {marker}'))",
    "y ~ x; open('{marker}', 'w')",
    "y ~ lambda q: open('{marker}', 'w')",
    "y ~ [open('{marker}', 'w')]",
    "y ~ x + exec(\"open('{marker}','w')\")",
    "y ~ I(x.__class__.__base__)",  # a name with dots is only ever a column name
]


@pytest.mark.parametrize("template", CODE_ATTEMPTS)
def test_formulas_never_run_code(template: str, tmp_path: Path,
                                 monkeypatch: pytest.MonkeyPatch) -> None:
    marker = tmp_path / "ran"
    formula = template.format(marker=marker)

    def forbidden(*args: Any, **kwargs: Any) -> Any:
        raise AssertionError("a formula reached eval/exec/compile")

    frame = sm.datasets.stackloss.load_pandas().data.rename(columns={"STACKLOSS": "y",
                                                                    "AIRFLOW": "x"})
    monitor.fit(frame, "y ~ x")  # imports every module first (importing compiles source)
    with monkeypatch.context() as patch:
        for name in ("eval", "exec", "compile"):
            patch.setattr(builtins, name, forbidden)
        with pytest.raises(RegwardenError) as caught:
            monitor.fit(frame, formula)
    assert isinstance(caught.value, (FormulaError, DataValidationError))
    assert not marker.exists()


# ---------------------------------------------------------------- categorical encoding


@pytest.fixture(scope="module")
def grunfeld() -> pd.DataFrame:
    return sm.datasets.grunfeld.load_pandas().data


def _chunk(frame: pd.DataFrame) -> dict[str, np.ndarray]:
    return {c: (frame[c].to_numpy(dtype=float) if c != "firm" else
                frame[c].astype(object).to_numpy()) for c in frame.columns}


def test_levels_sorted_reference_first_and_labels(grunfeld: pd.DataFrame) -> None:
    firms = sorted(grunfeld.firm.unique())
    result = monitor.fit(grunfeld, "invest ~ value + firm")
    assert result.terms == ("Intercept", "value", *[f"firm[{f}]" for f in firms[1:]])
    declared = monitor.fit(grunfeld, "invest ~ value + firm",
                           categorical={"firm": CategoricalSpec(reference="IBM")})
    assert declared.terms == ("Intercept", "value",
                              *[f"firm[{f}]" for f in firms if f != "IBM"])
    # same model, another reference level: same fit
    assert declared.ss_resid == pytest.approx(result.ss_resid, rel=1e-12)


def test_without_intercept_the_first_categorical_is_coded_in_full(grunfeld: pd.DataFrame) -> None:
    firms = sorted(grunfeld.firm.unique())
    result = monitor.fit(grunfeld, "invest ~ firm + value - 1")
    assert result.terms == (*[f"firm[{f}]" for f in firms], "value")
    assert result.aliased_terms == ()


def test_interaction_labels_join_factor_labels(grunfeld: pd.DataFrame) -> None:
    firms = sorted(grunfeld.firm.unique())
    result = monitor.fit(grunfeld, "invest ~ value*firm")
    assert result.terms == ("Intercept", "value", *[f"firm[{f}]" for f in firms[1:]],
                            *[f"value:firm[{f}]" for f in firms[1:]])


def test_numeric_codes_sort_by_value() -> None:
    d = sm.datasets.fair.load_pandas().data
    result = monitor.fit(d, "affairs ~ C(yrs_married)")
    # fair's yrs_married takes the values 0.5, 2.5, 6, 9, 13, 16.5, 23
    assert result.terms == ("Intercept", "yrs_married[2.5]", "yrs_married[6]", "yrs_married[9]",
                            "yrs_married[13]", "yrs_married[16.5]", "yrs_married[23]")


def test_a_level_missing_from_the_first_chunk_is_still_a_level(grunfeld: pd.DataFrame) -> None:
    # grunfeld is sorted by firm: 20-row chunks each hold one firm only
    whole = monitor.fit(grunfeld, "invest ~ value + firm")
    chunked = monitor.fit(grunfeld, "invest ~ value + firm", chunk_rows=20)
    assert chunked.terms == whole.terms and chunked.dropped_rows == 0
    assert chunked.ss_resid == pytest.approx(whole.ss_resid, rel=1e-12)


def test_encoding_is_frozen_and_unseen_levels_are_counted_not_zeroed(
        grunfeld: pd.DataFrame) -> None:
    baseline = grunfeld[grunfeld.firm != "IBM"]
    design = build_design(["invest ~ value + firm"], _chunk(baseline))
    assert "firm[IBM]" not in [c.label for c in design.columns]
    fresh = _chunk(grunfeld)
    encoded = design.encode(fresh)
    ibm_rows = int((grunfeld.firm == "IBM").sum())
    # unseen rows are left out of X, never encoded as all-zero dummies (= reference level)
    assert encoded.unseen_levels == {"firm": {"IBM": ibm_rows}}
    assert encoded.dropped_rows == ibm_rows and encoded.X.shape == (len(grunfeld) - ibm_rows,
                                                                      len(design.columns))
    assert not encoded.usable[(grunfeld.firm == "IBM").to_numpy()].any()
    np.testing.assert_array_equal(
        encoded.X, design.encode(_chunk(baseline)).X)  # same columns, same values

    def chunks() -> Iterator[dict[str, np.ndarray]]:
        yield fresh

    one = pass_one(chunks(), ["invest ~ value + firm"], design=design)
    assert one.totals.unseen_levels == {"firm": {"IBM": ibm_rows}}
    assert one.totals.dropped_rows == ibm_rows
    with pytest.raises(DataValidationError, match="unseen level") as caught:
        pass_one(chunks(), ["invest ~ value + firm"], design=design, strict=True)
    first_ibm = int(np.argmax((grunfeld.firm == "IBM").to_numpy()))
    assert caught.value.where == f"column 'firm', row {first_ibm}"


def test_declared_levels_report_unseen_values_in_a_fit(grunfeld: pd.DataFrame) -> None:
    firms = sorted(grunfeld.firm.unique())
    known = [f for f in firms if f != "Goodyear"]
    result = monitor.fit(grunfeld, "invest ~ value + firm",
                         categorical={"firm": CategoricalSpec(levels=tuple(known))})
    assert result.unseen_levels == {"firm": {"Goodyear": 20}}
    assert result.dropped_rows == 20 and result.n == len(grunfeld) - 20
    assert result.to_dict()["unseen_levels"] == {"firm": {"Goodyear": 20}}


def test_missing_category_values_are_dropped_and_counted(grunfeld: pd.DataFrame) -> None:
    frame = grunfeld.copy()
    frame["firm"] = frame["firm"].astype(object)
    frame.loc[[3, 50, 51], "firm"] = None
    result = monitor.fit(frame, "invest ~ value + firm")
    assert result.dropped_rows == 3 and result.n == len(frame) - 3
    with pytest.raises(DataValidationError, match="firm") as caught:
        monitor.fit(frame, "invest ~ value + firm", strict=True)
    assert "row 3" in caught.value.where


def test_text_cannot_enter_a_transform_or_the_response(grunfeld: pd.DataFrame) -> None:
    with pytest.raises(DataValidationError, match="text"):
        monitor.fit(grunfeld, "invest ~ log(firm)")
    with pytest.raises(DataValidationError, match="response column 'firm' is not numeric"):
        monitor.fit(grunfeld, "firm ~ value")
