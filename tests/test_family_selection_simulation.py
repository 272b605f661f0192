"""Model choice under a known truth (seeded simulation; the data are invented for the test).

Truth: ``y = 1 + 0.5·x1 + 0.3·x2 + e`` with independent standard normal x1, x2, x3 and e.
Candidates: ``under`` (x1), ``true`` (x1 + x2) and ``over`` (x1 + x2 + x3).

* BIC is consistent (Schwarz 1978): the probability that it picks ``true`` rises to 1 as n
  grows.
* AIC is not: once ``under`` is out of the race, AIC prefers ``over`` exactly when
  ``n·ln(SSR_true/SSR_over) > 2``, i.e. when the partial F statistic, which is F(1, n − 4) under
  the truth, exceeds ``(n − 4)(e^{2/n} − 1)``.  That probability tends to P(χ²₁ > 2) = 0.157
  (Shibata 1976, Biometrika 63(1), 117-126, for the over-fitting limit of AIC [from memory:
  citation]; the finite-n value here is computed exactly from the F distribution).  The same
  event with ``ln n`` in place of 2 gives BIC's over-fitting probability.

Measured with seed 1978 and 500 replications per n (this test; ``tests/benchmarks/
sim_family_selection.py`` runs more):

====  ==========  ==========  ===============  ==========  ==========  ===============
n     BIC→true    BIC→over    BIC over, exact  AIC→true    AIC→over    AIC over, exact
====  ==========  ==========  ===============  ==========  ==========  ===============
50    0.518       0.046       0.059            0.620       0.152       0.177
200   0.936       0.022       0.023            0.862       0.136       0.162
1000  0.992       0.008       0.0087           0.850       0.150       0.158
5000  0.998       0.002       0.0035           0.852       0.148       0.1575
====  ==========  ==========  ===============  ==========  ==========  ===============

At n = 50 both criteria still pick ``under`` often (BIC 0.436, AIC 0.228): x2's effect is
small against n, and BIC's heavier penalty under-fits first.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from monitor.stats.family import evaluate_family, make_family_spec

CANDIDATES = {"under": "y ~ x1", "true": "y ~ x1 + x2", "over": "y ~ x1 + x2 + x3"}
SIZES = (50, 200, 1000, 5000)
REPLICATIONS = 500
P_OVER = 4  # parameters of 'over'


def choices(n: int, replications: int, rng: np.random.Generator) -> dict[str, dict[str, float]]:
    spec = make_family_spec(response="y", candidates=CANDIDATES, chosen="true", criterion="bic")
    counts = {"aic": dict.fromkeys(CANDIDATES, 0), "bic": dict.fromkeys(CANDIDATES, 0)}
    for _ in range(replications):
        x1, x2, x3, noise = rng.standard_normal((4, n))
        chunk = {"y": 1.0 + 0.5 * x1 + 0.3 * x2 + noise, "x1": x1, "x2": x2, "x3": x3}
        report = evaluate_family(spec, lambda chunk=chunk: iter([chunk]), refinement_passes=0)
        by_bic = min(report.ranking, key=lambda row: row.bic).name
        assert report.verdict.best == by_bic
        counts["bic"][by_bic] += 1
        counts["aic"][min(report.ranking, key=lambda row: row.aic).name] += 1
    return {criterion: {name: count / replications for name, count in picks.items()}
            for criterion, picks in counts.items()}


def exact_over_fit(n: int, penalty: float) -> float:
    """P(F(1, n − 4) > (n − 4)(e^{penalty/n} − 1)): 'over' beats 'true' under the truth."""
    return float(stats.f.sf((n - P_OVER) * math.expm1(penalty / n), 1, n - P_OVER))


@pytest.fixture(scope="module")
def rates() -> dict[int, dict[str, dict[str, float]]]:
    rng = np.random.default_rng(1978)
    return {n: choices(n, REPLICATIONS, rng) for n in SIZES}


def binomial_band(probability: float, replications: int, z: float = 4.0) -> float:
    return z * math.sqrt(probability * (1 - probability) / replications) + 1.0 / replications


def test_bic_picks_the_true_model_with_probability_rising_to_one(rates):
    true_rate = [rates[n]["bic"]["true"] for n in SIZES]
    assert true_rate[-1] >= 0.97
    assert true_rate[0] < true_rate[1] <= true_rate[-1] + binomial_band(0.95, REPLICATIONS)
    for n in SIZES:
        expected = exact_over_fit(n, math.log(n))
        assert abs(rates[n]["bic"]["over"] - expected) <= binomial_band(expected, REPLICATIONS)


def test_aic_over_fits_with_a_fixed_small_probability(rates):
    for n in SIZES[1:]:  # from n = 200 on, 'under' no longer wins, so the exact formula applies
        expected = exact_over_fit(n, 2.0)
        assert abs(rates[n]["aic"]["over"] - expected) <= binomial_band(expected, REPLICATIONS)
    # the over-fitting probability does not vanish: it tends to P(chi2_1 > 2) = 0.157
    limit = float(stats.chi2.sf(2.0, 1))
    assert exact_over_fit(100_000, 2.0) == pytest.approx(limit, abs=1e-3)
    large = np.mean([rates[n]["aic"]["over"] for n in SIZES[2:]])
    assert abs(large - limit) <= binomial_band(limit, 2 * REPLICATIONS)
