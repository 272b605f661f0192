"""Seeded size and power simulations of the checks (run by test_checks_size_power.py).

Run as ``python tests/checks_simulation.py PART`` in a child process with single-threaded
BLAS (tiny matrices pay more for threads than they gain).  Prints JSON: per scenario the
number of replications and, per check, how many rejected at the 5 % level.  Seeds are fixed
per (scenario, replication) before any result is looked at.
"""

from __future__ import annotations

import json
import sys

import numpy as np

from monitor.stats.checks import run_checks
from monitor.stats.drift import build_snapshot
from monitor.stats.fitting import derive_factor, pass_one
from monitor.stats.residual_pass import CheckOptions, residual_pass

N_BASE, N_FRESH = 400, 200
OPTIONS = CheckOptions(refine=False, sample_size=N_BASE, path_points=8, top_rows=1)
LEVEL = 0.05
#: drift checks with a nominal level (psi is read against thresholds, not a level)
DRIFT = ("chow", "coefficient_wald", "ks_residuals", "anderson_darling_ksample", "mean_shift",
         "variance_ratio", "forecast_error_ratio", "interval_coverage", "input_drift")
SCENARIOS = ["null", "heavy_tails", "heteroscedastic", "autocorrelated", "curved", "break",
             "outlier", "drift_mean", "drift_scale", "drift_coefficients"]


def window(rng: np.random.Generator, n: int, start: int, scenario: str) -> dict:  # type: ignore[type-arg]
    x1 = rng.normal(size=n)
    x2 = rng.normal(size=n)
    errors = rng.normal(size=n)
    if scenario == "heavy_tails":          # t(5) errors, scaled to unit variance
        errors = rng.standard_t(5, n) / np.sqrt(5 / 3)
    elif scenario == "heteroscedastic":    # SD = exp(0.5·x1)
        errors = errors * np.exp(0.5 * x1)
    elif scenario == "autocorrelated":     # AR(1), ρ = 0.3
        for t in range(1, n):
            errors[t] += 0.3 * errors[t - 1]
    elif scenario == "outlier":            # one row shifted by 6 SD
        errors[n // 3] += 6.0
    y = 1.0 + x1 + 0.5 * x2 + errors
    if scenario == "curved":               # a quadratic term the model leaves out
        y += 0.25 * x1**2
    if scenario == "break":                # intercept up by 0.5 SD in the second half
        y[n // 2:] += 0.5
    return {"y": y, "x1": x1, "x2": x2, "t": np.arange(start, start + n, dtype=float)}


def fresh_window(rng: np.random.Generator, scenario: str) -> dict:  # type: ignore[type-arg]
    chunk = window(rng, N_FRESH, N_BASE, "null")
    if scenario == "drift_mean":           # forecast errors shifted by 0.3 SD
        chunk["y"] = chunk["y"] + 0.3
    elif scenario == "drift_scale":        # error SD × 1.3
        chunk["y"] = chunk["y"] + 0.3 * rng.normal(size=N_FRESH) * np.sqrt(1.3**2 - 1) / 0.3
    elif scenario == "drift_coefficients":  # slope of x1 from 1.0 to 1.25
        chunk["y"] = chunk["y"] + 0.25 * chunk["x1"]
    return chunk


def passes(chunk: dict, baseline=None, break_value=None):  # type: ignore[no-untyped-def]
    one = pass_one([chunk], ["y ~ x1 + x2"])
    factor = derive_factor(one, 0)
    return residual_pass([chunk], one.design, one.state, [factor], time_column="t",
                         baseline=baseline, break_value=break_value, options=OPTIONS)


def replicate(scenario: str, replication: int) -> list[str]:
    """The ids of the checks that rejected at 5 % in one replication."""
    rng = np.random.default_rng([SCENARIOS.index(scenario), replication, 20240917])
    base = window(rng, N_BASE, 0, scenario if not scenario.startswith("drift") else "null")
    two = passes(base, break_value=float(N_BASE // 2))
    rejected = [c.check for c in run_checks(two, 0)
                if c.applicable and c.p_value is not None and c.p_value < LEVEL]
    if scenario == "null" or scenario.startswith("drift"):
        snapshot = build_snapshot(two)
        fresh = passes(fresh_window(rng, scenario), baseline=snapshot)
        rejected += [f"drift:{c.check}" for c in run_checks(fresh, 0)
                     if c.check in DRIFT and c.applicable and c.p_value is not None
                     and c.p_value < LEVEL]
    return rejected


def main(part: int, parts: int, null_reps: int, power_reps: int) -> dict:  # type: ignore[type-arg]
    out: dict = {}  # type: ignore[type-arg]
    plan = [("null", null_reps)] + [(s, power_reps) for s in SCENARIOS[1:]]
    for scenario, reps in plan:
        counts: dict[str, int] = {}
        mine = range(part, reps, parts)
        for replication in mine:
            for check in replicate(scenario, replication):
                counts[check] = counts.get(check, 0) + 1
        out[scenario] = {"replications": len(mine), "rejections": counts}
    return out


if __name__ == "__main__":
    part, parts, null_reps, power_reps = (int(v) for v in sys.argv[1:5])
    json.dump(main(part, parts, null_reps, power_reps), sys.stdout)
