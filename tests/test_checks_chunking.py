"""Chunking does not change results: one chunk against a thousand, lags across chunk edges."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from checks_support import checks_by_id, relative, run_family

from monitor.stats.formula import CategoricalSpec
from monitor.stats.residual_pass import CheckOptions

#: statistics computed from every row (not from the random sample)
EXACT = ["jarque_bera", "dagostino_pearson", "breusch_pagan", "breusch_pagan_studentized",
         "white", "durbin_watson", "breusch_godfrey", "ljung_box", "reset", "vif",
         "condition_index", "outlier_bonferroni", "cooks_distance", "cusum", "chow"]


def series(seed: int, n: int = 3000) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x1 = rng.gamma(2.0, 3.0, n) + 500.0   # far from zero: exercises the centring
    x2 = rng.normal(size=n)
    level = rng.choice(["a", "b", "c", "d"], n)
    noise = np.zeros(n)
    for t in range(1, n):
        noise[t] = 0.4 * noise[t - 1] + rng.normal() * (1 + 0.3 * abs(x2[t]))
    y = 3.0 + 0.02 * x1 + x2 + 0.5 * (level == "b") + noise
    return pd.DataFrame({"y": y, "x1": x1, "x2": x2, "level": level,
                         "day": np.arange(n, dtype=float)})


FAMILY = ["y ~ x1 + x2 + level", "y ~ x2", "y ~ 0 + x1 + x2", "y ~ x1 * x2"]


@pytest.fixture(scope="module", params=[5, 6], ids=["seed5", "seed6"])
def two_chunkings(request):  # type: ignore[no-untyped-def]
    frame = series(request.param)
    options = CheckOptions(sample_size=400)
    # levels declared: the first 3-row chunk would otherwise freeze too few of them
    levels = {"level": CategoricalSpec(levels=("a", "b", "c", "d"))}
    whole = run_family(frame, FAMILY, time_column="day", options=options, break_value=1500.0,
                       categorical=levels)
    pieces = run_family(frame, FAMILY, rows=3, time_column="day", options=options,
                        break_value=1500.0, categorical=levels)
    assert pieces.chunks == 1000 and whole.chunks == 1
    return whole, pieces


@pytest.mark.parametrize("model", range(len(FAMILY)), ids=FAMILY)
def test_one_chunk_and_a_thousand_chunks_agree(two_chunkings, model):
    whole, pieces = two_chunkings
    a, b = checks_by_id(whole, model), checks_by_id(pieces, model)
    for name in EXACT:
        assert a[name].applicable and b[name].applicable, name
        tolerance = 1e-10
        if name == "white":
            # White's auxiliary regression is solved from streamed cross-products, so its
            # rounding error scales with the auxiliary condition number κ (stated in detail;
            # bound used: 1e-15·κ);
            # x1·x2 with x1 near 500 makes κ ~1.6e9 for the interaction model
            tolerance = max(1e-10, 1e-15 * a[name].detail["auxiliary_condition_number"])
        assert relative(b[name].statistic, a[name].statistic) < tolerance, name
        if a[name].p_value is not None:
            # a p-value carries the statistic's relative error times |d ln p / d ln T|,
            # which is about |ln p| for χ² and F tails
            tolerance *= max(1.0, abs(math.log(max(a[name].p_value, 1e-300))))
            assert math.isclose(b[name].p_value, a[name].p_value, rel_tol=tolerance,
                                abs_tol=1e-300), name
    # the seeded sample does not depend on the chunking either
    for name in ("shapiro_wilk", "anderson_darling"):
        assert a[name].sample_size == 400
        assert b[name].statistic == pytest.approx(a[name].statistic, rel=1e-12)
    # nor do the rows named by key
    assert [r["key"] for r in a["cooks_distance"].detail["top_rows"]] == \
        [r["key"] for r in b["cooks_distance"].detail["top_rows"]]
    assert a["cusum"].detail["change"]["row"] == b["cusum"].detail["change"]["row"]


def test_refined_coefficients_do_not_depend_on_the_chunking(two_chunkings):
    whole, pieces = two_chunkings
    for left, right in zip(whole.refined_coefficients, pieces.refined_coefficients, strict=True):
        assert np.allclose(left, right, rtol=1e-13, atol=0)
