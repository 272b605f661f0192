"""Size and power of the checks by seeded simulation (tests/checks_simulation.py).

Design (fixed before any result was looked at): y = 1 + x1 + 0.5·x2 + ε, x1, x2, ε iid
N(0, 1), model ``y ~ x1 + x2``, rows in time order; a baseline window of 400 rows and a
fresh window of 200 rows; level 5 %; seeds ``(scenario, replication, 20240917)``.
Size: 1,000 replications under the null; each rate must lie in the binomial 99.9 %
interval around 0.05, i.e. [0.029, 0.074] (scipy.stats.binom quantiles).  n = 400 is
large enough for every asymptotic test here; Jarque–Bera is known to be conservative in
small samples (its χ²(2) approximation is poor below a few hundred rows), and the
Bonferroni-based tests (outlier, input drift) are conservative by construction: for
them only the upper end is asserted.

Measured (2 worker processes, this repository at the commit adding this file):

=================================  =====  ======================================
check                              size   power (planted violation, 200 reps)
=================================  =====  ======================================
jarque_bera                        0.039  0.99  t(5) errors
dagostino_pearson                  0.051  0.99  t(5) errors
shapiro_wilk                       0.054  0.985 t(5) errors
anderson_darling                   0.051  0.96  t(5) errors
breusch_pagan                      0.054  1.00  SD = exp(0.5·x1)
breusch_pagan_studentized          0.052  1.00  SD = exp(0.5·x1)
white                              0.055  1.00  SD = exp(0.5·x1)
durbin_watson                      0.041  1.00  AR(1) errors, ρ = 0.3
breusch_godfrey                    0.044  0.985 AR(1) errors, ρ = 0.3
ljung_box                          0.054  0.99  AR(1) errors, ρ = 0.3
reset                              0.063  0.98  + 0.25·x1² left out
outlier_bonferroni                 0.048  0.99  one row + 6 SD
cusum                              0.047  0.995 intercept + 0.5 SD in the second half
chow (break at row 200)            0.057  0.995 same break
drift chow (between windows)       0.043  0.78  fresh errors + 0.3 SD
coefficient_wald                   0.046  0.65  slope of x1 1.0 -> 1.25
ks_residuals                       0.047  0.82  fresh errors + 0.3 SD
anderson_darling_ksample           0.047  0.87  fresh errors + 0.3 SD
mean_shift                         0.048  0.89  fresh errors + 0.3 SD
variance_ratio                     0.050  0.985 fresh error SD × 1.3
forecast_error_ratio               0.041  0.99  fresh error SD × 1.3
interval_coverage                  0.057  0.955 fresh error SD × 1.3
input_drift                        0.050  —     (no regressor drift planted)
=================================  =====  ======================================
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

HERE = Path(__file__).resolve().parent
NULL_REPLICATIONS, POWER_REPLICATIONS, WORKERS = 1000, 200, 2
# binomial 99.9 % interval of a 5 % rate over 1000 replications (scipy.stats.binom.ppf /
# isf at 0.0005)
LOW, HIGH = 0.029, 0.074

SIZE_CHECKS = ["dagostino_pearson", "shapiro_wilk", "anderson_darling", "breusch_pagan",
               "breusch_pagan_studentized", "white", "durbin_watson", "breusch_godfrey",
               "ljung_box", "reset", "cusum", "chow", "drift:chow", "drift:coefficient_wald",
               "drift:ks_residuals", "drift:anderson_darling_ksample", "drift:mean_shift",
               "drift:variance_ratio", "drift:forecast_error_ratio", "drift:interval_coverage"]
CONSERVATIVE = ["jarque_bera", "outlier_bonferroni", "drift:input_drift"]
POWER = {
    "heavy_tails": ["jarque_bera", "dagostino_pearson", "shapiro_wilk", "anderson_darling"],
    "heteroscedastic": ["breusch_pagan", "breusch_pagan_studentized", "white"],
    "autocorrelated": ["durbin_watson", "breusch_godfrey", "ljung_box"],
    "curved": ["reset"],
    "outlier": ["outlier_bonferroni"],
    "break": ["cusum", "chow"],
    "drift_mean": ["drift:chow", "drift:ks_residuals", "drift:anderson_darling_ksample",
                   "drift:mean_shift"],
    "drift_scale": ["drift:variance_ratio", "drift:forecast_error_ratio",
                    "drift:interval_coverage"],
    "drift_coefficients": ["drift:coefficient_wald"],
}


@pytest.fixture(scope="module")
def rates() -> dict:  # type: ignore[type-arg]
    """Rejection rates per scenario and check, from worker processes run in parallel."""
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1",
               MKL_NUM_THREADS="1", PYTHONPATH=str(HERE.parent))
    workers = [subprocess.Popen(
        [sys.executable, str(HERE / "checks_simulation.py"), str(part), str(WORKERS),
         str(NULL_REPLICATIONS), str(POWER_REPLICATIONS)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env, text=True)
        for part in range(WORKERS)]
    outputs = []
    for worker in workers:
        out, err = worker.communicate(timeout=600)
        assert worker.returncode == 0, err
        outputs.append(json.loads(out))
    combined: dict = {}  # type: ignore[type-arg]
    for scenario in outputs[0]:
        replications = sum(o[scenario]["replications"] for o in outputs)
        counts: dict[str, int] = {}
        for o in outputs:
            for check, count in o[scenario]["rejections"].items():
                counts[check] = counts.get(check, 0) + count
        combined[scenario] = {check: count / replications for check, count in counts.items()}
        combined[scenario]["_replications"] = replications
    return combined


def test_every_test_holds_its_level_under_the_null(rates):
    null = rates["null"]
    assert null["_replications"] == NULL_REPLICATIONS
    outside = {c: null.get(c, 0.0) for c in SIZE_CHECKS if not LOW <= null.get(c, 0.0) <= HIGH}
    assert not outside, outside
    too_many = {c: null.get(c, 0.0) for c in CONSERVATIVE if null.get(c, 0.0) > HIGH}
    assert not too_many, too_many


@pytest.mark.parametrize("scenario", sorted(POWER))
def test_each_test_detects_its_planted_violation(rates, scenario):
    observed = rates[scenario]
    assert observed["_replications"] == POWER_REPLICATIONS
    weak = {c: observed.get(c, 0.0) for c in POWER[scenario] if observed.get(c, 0.0) < 0.5}
    assert not weak, weak
