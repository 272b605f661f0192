"""The mergeable least-squares state: chunking, order and tree shape do not change a fit.

Data: the RAND health insurance experiment sample shipped in statsmodels
(``statsmodels.datasets.randhie``, 20,190 rows) and the Fair affairs survey
(``statsmodels.datasets.fair``, 6,366 rows).  The property checks compare our fit
with our own fit of the same rows; the 1e-12 relative tolerance is issue 2's
("Must show", merge property).  One subset fit is also checked against
statsmodels OLS (a test-only reference) at 1e-9, the issue's agreement tolerance.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
import pytest

import monitor
from monitor.stats.engine import LeastSquaresState, SubsetFactor

sm = pytest.importorskip("statsmodels.api")

MERGE_RTOL = 1e-12
NAMES = ["lncoins", "idp", "lpi", "fmde", "physlm", "disea", "hlthg", "hlthf", "hlthp"]
#: candidate models as column subsets of the union (indices into NAMES), with/without intercept
SUBSETS: list[tuple[tuple[int, ...], bool]] = [
    (tuple(range(len(NAMES))), True),
    ((0, 2, 4), True),
    ((5, 1, 8), True),  # not in the union's order
    ((3,), True),
    ((0, 2, 4, 6), False),
]


@pytest.fixture(scope="module")
def randhie() -> tuple[np.ndarray, np.ndarray]:
    d = sm.datasets.randhie.load_pandas().data
    return d[NAMES].to_numpy(dtype=float), d["mdvis"].to_numpy(dtype=float)


def _assert_same(a: SubsetFactor, b: SubsetFactor, what: str) -> None:
    assert a.n == b.n and a.columns == b.columns and a.aliased == b.aliased, what
    np.testing.assert_allclose(a.coefficients, b.coefficients, rtol=MERGE_RTOL, atol=0,
                               err_msg=f"{what}: coefficients")
    np.testing.assert_allclose(a.ssr, b.ssr, rtol=MERGE_RTOL, err_msg=f"{what}: ssr")
    np.testing.assert_allclose(a.explained, b.explained, rtol=MERGE_RTOL,
                               err_msg=f"{what}: explained")
    np.testing.assert_allclose(np.diag(a.unscaled_covariance()),
                               np.diag(b.unscaled_covariance()), rtol=MERGE_RTOL,
                               err_msg=f"{what}: (X'X)^-1 diagonal")


def _states(X: np.ndarray, y: np.ndarray, pieces: int, order: np.ndarray) -> list[LeastSquaresState]:
    states = []
    for rows in np.array_split(order, pieces):
        states.append(LeastSquaresState(X.shape[1]).absorb(X[rows], y[rows]))
    return states


def _fold(states: Sequence[LeastSquaresState]) -> LeastSquaresState:
    merged = states[0]
    for state in states[1:]:
        merged = merged.merge(state)
    return merged


def _balanced(states: Sequence[LeastSquaresState]) -> LeastSquaresState:
    if len(states) == 1:
        return states[0]
    middle = len(states) // 2
    return _balanced(states[middle:]).merge(_balanced(states[:middle]))


def _random_tree(states: Sequence[LeastSquaresState], rng: np.random.Generator) -> LeastSquaresState:
    pool = list(states)
    while len(pool) > 1:
        i, j = rng.choice(len(pool), size=2, replace=False)
        merged = pool[i].merge(pool[j])
        pool = [s for k, s in enumerate(pool) if k not in (i, j)] + [merged]
    return pool[0]


def test_chunks_order_and_tree_shape_do_not_change_the_fit(
        randhie: tuple[np.ndarray, np.ndarray], rng: np.random.Generator) -> None:
    X, y = randhie
    reference = LeastSquaresState(X.shape[1]).absorb(X, y)  # all rows, one chunk
    expected = [reference.subset(columns, intercept) for columns, intercept in SUBSETS]
    for pieces in (7, 1000):
        shuffled = rng.permutation(len(y))
        for order_name, order in (("file order", np.arange(len(y))), ("shuffled", shuffled)):
            states = _states(X, y, pieces, order)
            streamed = LeastSquaresState(X.shape[1])
            for rows in np.array_split(order, pieces)[::-1]:  # chunks arrive backwards
                streamed.absorb(X[rows], y[rows])
            candidates = {
                "absorbed one by one": streamed,
                "left fold of merges": _fold(states),
                "balanced tree": _balanced(states),
                "random tree": _random_tree([states[k] for k in rng.permutation(pieces)], rng),
            }
            for shape, state in candidates.items():
                assert state.n == len(y)
                for (columns, intercept), want in zip(SUBSETS, expected, strict=True):
                    _assert_same(state.subset(columns, intercept), want,
                                 f"{pieces} chunks, {order_name}, {shape}, model {columns}")


def test_subset_from_union_equals_direct_fit_of_the_subset(
        randhie: tuple[np.ndarray, np.ndarray]) -> None:
    X, y = randhie
    union = _balanced(_states(X, y, 7, np.arange(len(y))))
    for columns, intercept in SUBSETS:
        direct = LeastSquaresState(len(columns)).absorb(X[:, list(columns)], y)
        from_union = union.subset(columns, intercept)
        alone = direct.subset(tuple(range(len(columns))), intercept)
        np.testing.assert_allclose(from_union.coefficients, alone.coefficients, rtol=MERGE_RTOL)
        np.testing.assert_allclose(from_union.ssr, alone.ssr, rtol=MERGE_RTOL)
        np.testing.assert_allclose(from_union.explained, alone.explained, rtol=MERGE_RTOL)
        np.testing.assert_allclose(from_union.unscaled_covariance(), alone.unscaled_covariance(),
                                   rtol=MERGE_RTOL, atol=0)
        # reference: statsmodels OLS(method="qr") on the subset's columns
        design = X[:, list(columns)]
        if intercept:
            design = np.column_stack([np.ones(len(y)), design])
        ols = sm.OLS(y, design).fit(method="qr")
        np.testing.assert_allclose(from_union.coefficients, ols.params, rtol=1e-9)
        np.testing.assert_allclose(from_union.ssr, ols.ssr, rtol=1e-9)


def test_family_fit_through_formulas_matches_each_formula_alone() -> None:
    d = sm.datasets.fair.load_pandas().data
    formulas = [
        "affairs ~ rate_marriage + age + yrs_married + children + religious + educ",
        "affairs ~ rate_marriage + yrs_married",
        "affairs ~ religious + C(occupation) + educ",
        "affairs ~ rate_marriage * age - 1",
    ]
    from monitor._frames import chunk_source
    from monitor.stats.fitting import fit_formulas

    columns = sorted({c for f in formulas for c in monitor.parse_formula(f).columns})
    _, together = fit_formulas(chunk_source(d, columns, 700), formulas)
    for formula, joint in zip(formulas, together, strict=True):
        alone = monitor.fit(d, formula)
        assert joint.terms == alone.terms
        for field in ("n", "rank", "df_model", "df_resid"):
            assert getattr(joint, field) == getattr(alone, field)
        for field in ("ss_model", "ss_resid", "f_statistic", "r_squared", "sigma", "aic", "aicc"):
            assert getattr(joint, field) == pytest.approx(getattr(alone, field), rel=MERGE_RTOL)
        for a, b in zip(joint.coefficients, alone.coefficients, strict=True):
            assert a.estimate == pytest.approx(b.estimate, rel=MERGE_RTOL)
            assert a.std_error == pytest.approx(b.std_error, rel=MERGE_RTOL)


@pytest.mark.parametrize("chunk_rows", [6_366, 911, 7])
def test_chunk_size_does_not_change_a_formula_fit(chunk_rows: int) -> None:
    d = sm.datasets.fair.load_pandas().data
    formula = "affairs ~ rate_marriage + age * C(religious) + yrs_married"
    one = monitor.fit(d, formula, chunk_rows=len(d))
    other = monitor.fit(d, formula, chunk_rows=chunk_rows)
    for field in ("ss_model", "ss_resid", "f_statistic", "r_squared", "log_likelihood"):
        assert getattr(other, field) == pytest.approx(getattr(one, field), rel=MERGE_RTOL)
    for a, b in zip(other.coefficients, one.coefficients, strict=True):
        assert a.estimate == pytest.approx(b.estimate, rel=MERGE_RTOL)
        assert a.std_error == pytest.approx(b.std_error, rel=MERGE_RTOL)


# ------------------------------------------------------------------------ rank and aliasing


@pytest.fixture(scope="module")
def fair_extra() -> pd.DataFrame:
    d = sm.datasets.fair.load_pandas().data.copy()
    d["constant"] = 5.0  # a column with one value
    d["age_again"] = d["age"]  # a duplicate
    d["age_plus_educ"] = d["age"] + d["educ"]  # an exact linear combination
    return d


@pytest.mark.parametrize(("extra", "formula"), [
    ("constant", "affairs ~ age + constant + educ"),
    ("age_again", "affairs ~ age + educ + age_again"),
    ("age_plus_educ", "affairs ~ age + educ + age_plus_educ"),
])
def test_dependent_columns_are_reported_as_aliased(fair_extra: pd.DataFrame, extra: str,
                                                   formula: str) -> None:
    result = monitor.fit(fair_extra, formula)
    assert result.aliased_terms == (extra,)
    assert result.rank == 3 and result.df_model == 2
    assert extra in result.terms
    row = result.coefficients[result.terms.index(extra)]
    assert row.aliased and np.isnan(row.estimate) and np.isnan(row.std_error)
    assert [c for c in result.to_dict()["coefficients"] if c["term"] == extra][0]["estimate"] \
        is None
    # the estimable part is the fit without the aliased column
    plain = monitor.fit(fair_extra, "affairs ~ age + educ")
    assert result.ss_resid == pytest.approx(plain.ss_resid, rel=MERGE_RTOL)
    assert result.params()["age"] == pytest.approx(plain.params()["age"], rel=1e-10)
    assert result.aic == pytest.approx(plain.aic, rel=MERGE_RTOL)


def test_a_constant_column_is_estimable_without_intercept(fair_extra: pd.DataFrame) -> None:
    result = monitor.fit(fair_extra, "affairs ~ constant + age - 1")
    assert result.aliased_terms == () and result.rank == 2
    with_intercept = monitor.fit(fair_extra, "affairs ~ age")
    # constant·b = intercept: same fit, coefficient scaled by 1/5
    assert result.params()["constant"] * 5.0 == pytest.approx(
        with_intercept.params()["Intercept"], rel=1e-10)


def test_state_bookkeeping(randhie: tuple[np.ndarray, np.ndarray]) -> None:
    X, y = randhie
    state = LeastSquaresState(X.shape[1])
    state.absorb(X[:100], y[:100]).absorb(X[100:100], y[100:100]).absorb(X[100:300], y[100:300])
    assert state.n == 300 and state.chunks_absorbed == 2
    empty = LeastSquaresState(X.shape[1])
    _assert_same(state.merge(empty).subset((0, 1), True), state.subset((0, 1), True), "merge empty")
    _assert_same(empty.merge(state).subset((0, 1), True), state.subset((0, 1), True), "empty merge")
    with pytest.raises(ValueError, match="does not fit"):
        state.absorb(X[:5, :3], y[:5])
    with pytest.raises(ValueError, match="different columns"):
        state.merge(LeastSquaresState(3))
    with pytest.raises(ValueError, match="no rows"):
        LeastSquaresState(2).subset((0,), True)
