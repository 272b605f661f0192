"""False alarms and detection delays of the default alert policy, by seeded simulation.

Run on demand (not collected by pytest)::

    python3 tests/benchmarks/sim_false_alarms.py            # full: 100 monitor-years
    python3 tests/benchmarks/sim_false_alarms.py --quick    # a few seconds

The data are invented for this simulation.  One row per day of a stable process
``y = 1 + 0.8·x1 − 0.5·x2 + ε`` with independent standard normal inputs and
errors (σ = 1).  The chosen model is ``y ~ x1 + x2``; the larger candidate adds
the interaction ``x1:x2``.  The first 90 days are the baseline; every later
night one new row arrives and the monitor

* refits both models on the 90-day window (the project's least-squares engine)
  and runs a stand-in battery of fixed-window checks, each with a p-value
  (larger candidate's likelihood-ratio test, Jarque–Bera, Koenker's
  Breusch–Pagan, lag-1 autocorrelation, residual-variance ratio against the
  baseline) plus the overall F-test of the chosen model; these feed
  Benjamini–Hochberg + persistence and open at most warnings;
* scores the new row against the reference fit and advances the sequential
  charts (level, scale, serial, one pull chart per slope, one gain chart for the
  interaction), :mod:`monitor.runs.policy`;
* applies :func:`monitor.runs.rules.apply_rules` and counts the alerts opened.

Planted changes (each starts after 60 in-control nights; delay = nights from the
first changed row to the first alert opened, the changed night counting as 1):

* slope: the coefficient of x1 grows by σ/sd(x1) = 1;
* variance: the error variance doubles;
* ar1: errors become AR(1) with ρ = 0.5, innovations keeping σ (so the
  marginal variance grows to σ²/(1 − ρ²));
* ar1_same_variance: the same with the marginal variance kept at σ² (the
  hardest reading: about 0.14 nats of evidence per row);
* interaction: ``+ σ·x1·x2`` appears, so the larger candidate overtakes.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

import numpy as np
from scipy import stats

from monitor.runs.policy import AlertPolicy, WatchState, watch_night
from monitor.runs.rules import AlertRecord, Condition, apply_rules
from monitor.stats.engine import LeastSquaresState
from monitor.stats.sequential import ForecastReference

WINDOW = 90
SIGMA = 1.0
BETA = np.array([1.0, 0.8, -0.5])
LABELS = ("Intercept", "x1", "x2", "x1:x2")
CHOSEN = (0, 1, 2)
LARGER = (0, 1, 2, 3)
CHANGES = ("slope", "variance", "ar1", "ar1_same_variance", "interaction")
EPOCH = datetime(2030, 1, 1, tzinfo=UTC)


@dataclass
class Opening:
    night: int  # nights after the baseline, 1-based
    kind: str
    method: str


def generate(rng: np.random.Generator, days: int, change: str | None,
             change_day: int) -> tuple[np.ndarray, np.ndarray]:
    """Rows over the union columns [1, x1, x2, x1·x2] and the response."""
    x1 = rng.standard_normal(days)
    x2 = rng.standard_normal(days)
    X = np.column_stack([np.ones(days), x1, x2, x1 * x2])
    noise = rng.standard_normal(days) * SIGMA
    after = np.arange(days) >= change_day
    if change == "variance":
        noise = np.where(after, noise * math.sqrt(2.0), noise)
    elif change in ("ar1", "ar1_same_variance"):
        rho = 0.5
        # innovations keep sigma ("ar1": marginal variance grows to sigma^2/(1 - rho^2))
        # or shrink so the marginal variance stays sigma^2 ("ar1_same_variance")
        innovation = 1.0 if change == "ar1" else math.sqrt(1 - rho**2)
        correlated = noise.copy()
        for t in range(change_day + 1, days):
            correlated[t] = rho * correlated[t - 1] + innovation * noise[t]
        noise = np.where(after, correlated, noise)
    y = X[:, :3] @ BETA + noise
    if change == "slope":
        y = y + np.where(after, 1.0 * SIGMA * x1, 0.0)
    elif change == "interaction":
        y = y + np.where(after, SIGMA * x1 * x2, 0.0)
    return X, y


def window_conditions(X: np.ndarray, y: np.ndarray, baseline_variance: float,
                      baseline_df: int) -> list[Condition]:
    """Stand-in battery of fixed-window checks on the 90-day window."""
    state = LeastSquaresState(3).absorb(X[:, 1:], y)
    chosen = state.subset([0, 1], True)
    larger = state.subset([0, 1, 2], True)
    n = X.shape[0]
    p = chosen.n_parameters
    conditions = []
    # larger candidate against the chosen: likelihood ratio (nested), with the BIC gap
    lr = n * math.log(chosen.ssr / larger.ssr)
    bic_gap = lr - math.log(n)
    conditions.append(Condition("chosen_outranked", "breached" if bic_gap > 2.0 else "clean",
                                "window", model="y ~ x1 + x2", statistic_name="BIC gap",
                                statistic=bic_gap, threshold=2.0,
                                p_value=float(stats.chi2.sf(lr, 1)), subject="x1:x2"))
    # overall F of the chosen model
    df_resid = n - p
    f_stat = (chosen.explained / (p - 1)) / (chosen.ssr / df_resid)
    f_p = float(stats.f.sf(f_stat, p - 1, df_resid))
    conditions.append(Condition("chosen_not_significant", "breached" if f_p > 0.05 else "clean",
                                "window", model="y ~ x1 + x2", statistic_name="F",
                                statistic=f_stat, threshold=0.05, subject="overall F-test"))
    residuals = y - X[:, :3] @ chosen.coefficients
    jb = stats.jarque_bera(residuals)
    aux = LeastSquaresState(2).absorb(X[:, 1:3], residuals**2).subset([0, 1], True)
    koenker = n * aux.explained / (aux.explained + aux.ssr)
    r1 = float(np.sum(residuals[1:] * residuals[:-1]) / np.sum(residuals**2))
    ratio = (chosen.ssr / df_resid) / baseline_variance
    checks = [
        ("assumption_normality", "Jarque-Bera", float(jb.statistic), float(jb.pvalue)),
        ("assumption_constant_variance", "Koenker LM", koenker,
         float(stats.chi2.sf(koenker, 2))),
        ("assumption_independence", "lag-1 autocorrelation", r1,
         float(stats.norm.sf(r1 * math.sqrt(n)))),
        ("fit_degraded", "residual variance ratio", ratio,
         float(stats.f.sf(ratio, df_resid, baseline_df))),
    ]
    for kind, name, statistic, p_value in checks:
        conditions.append(Condition(kind, "breached" if p_value < 0.05 else "clean", "window",
                                    model="y ~ x1 + x2", statistic_name=name,
                                    statistic=statistic, p_value=p_value, subject=name))
    return conditions


def simulate_monitor(seed: int, nights: int, *, change: str | None = None,
                     change_night: int = 0, policy: AlertPolicy | None = None,
                     stop_at_first: bool = False) -> list[Opening]:
    """Run one simulated monitor for ``nights`` nights after its 90-day baseline."""
    policy = policy or AlertPolicy()
    rng = np.random.default_rng(seed)
    days = WINDOW + nights
    X, y = generate(rng, days, change, WINDOW + change_night - 1 if change else days)
    baseline = LeastSquaresState(3).absorb(X[:WINDOW, 1:], y[:WINDOW]).subset([0, 1], True)
    baseline_df = WINDOW - 3
    baseline_variance = baseline.ssr / baseline_df
    watch = WatchState(ForecastReference.from_rows(X[:WINDOW], y[:WINDOW]))
    records: list[AlertRecord] = []
    openings: list[Opening] = []
    persistence = policy.persistence_by_method()
    for night in range(1, nights + 1):
        today = WINDOW + night - 1
        watch, conditions = watch_night(
            watch, X[today:today + 1], y[today:today + 1], policy=policy, model="y ~ x1 + x2",
            column_labels=LABELS, chosen_columns=CHOSEN, watched_columns=(1, 2),
            larger_candidates=(LARGER,))
        window = slice(today - WINDOW + 1, today + 1)
        conditions += window_conditions(X[window], y[window], baseline_variance, baseline_df)
        outcome = apply_rules(records, conditions, monitor="sim", run_id=f"night-{night}",
                              run_at=EPOCH + timedelta(days=night), persistence=persistence,
                              false_discovery_rate=policy.false_discovery_rate,
                              window_severity_cap=policy.window_severity_cap)
        records = list(outcome.records)
        for event in outcome.events:
            if event.event == "opened":
                method = event.record.evidence.method if event.record.evidence else ""
                openings.append(Opening(night, event.record.key.kind, method))
        if stop_at_first and openings and (change is None or openings[-1].night >= change_night):
            break
    return openings


def false_alarm_rate(monitors: int, years: int, first_seed: int,
                     policy: AlertPolicy | None = None) -> tuple[float, int, dict[str, int]]:
    """(alerts per monitor-year, alerts, alerts by kind/method) for a stable process."""
    total = 0
    by_kind: dict[str, int] = {}
    for index in range(monitors):
        for opening in simulate_monitor(first_seed + index, 365 * years, policy=policy):
            total += 1
            label = f"{opening.kind} ({opening.method})"
            by_kind[label] = by_kind.get(label, 0) + 1
    return total / (monitors * years), total, by_kind


def detection_delays(change: str, replicates: int, first_seed: int, *, horizon: int = 150,
                     before: int = 60, policy: AlertPolicy | None = None
                     ) -> tuple[list[int], dict[str, int]]:
    """Delays (nights) to the first alert opened at or after the change; horizon+1 if none."""
    delays = []
    first_kinds: dict[str, int] = {}
    for index in range(replicates):
        openings = simulate_monitor(first_seed + index, before + horizon, change=change,
                                    change_night=before + 1, policy=policy, stop_at_first=True)
        after = [o for o in openings if o.night >= before + 1]
        if after:
            delays.append(after[0].night - before)
            label = f"{after[0].kind} ({after[0].method})"
            first_kinds[label] = first_kinds.get(label, 0) + 1
        else:
            delays.append(horizon + 1)
    return delays, first_kinds


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a short run for a smoke test")
    parser.add_argument("--monitors", type=int, default=50)
    parser.add_argument("--years", type=int, default=2)
    parser.add_argument("--replicates", type=int, default=100)
    options = parser.parse_args(argv)
    monitors, years, replicates = options.monitors, options.years, options.replicates
    if options.quick:
        monitors, years, replicates = 4, 1, 10
    started = time.perf_counter()
    rate, total, by_kind = false_alarm_rate(monitors, years, first_seed=1000)
    print(f"stable process: {monitors * years} monitor-years, {total} alerts opened, "
          f"{rate:.3f} alerts per monitor-year")
    for label, count in sorted(by_kind.items()):
        print(f"    {label}: {count}")
    for change in CHANGES:
        delays, kinds = detection_delays(change, replicates, first_seed=50_000)
        array = np.array(delays)
        print(f"{change:12s} replicates {replicates}: median delay {np.median(array):.0f} nights, "
              f"90th percentile {np.percentile(array, 90):.0f}, worst {array.max()}, "
              f"share within 30 nights {np.mean(array <= 30):.2f}; first alert kinds {kinds}")
    print(f"elapsed {time.perf_counter() - started:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
