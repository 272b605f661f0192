"""False alarms of the whole nightly run (every check, the verdict, the watch), by simulation.

Run on demand (not collected by pytest)::

    python3 tests/benchmarks/sim_run_false_alarms.py --monitors 2 --years 1

``sim_false_alarms.py`` measures the alert policy with a stand-in battery of six
fixed-window checks; this script runs the real thing: ``run_monitor`` night after
night on a Parquet file, with the full battery of the chosen model's checks and
drift checks, the family verdict, the data probes and the sequential watch, and
counts the alerts opened.

The data are GENERATED for this simulation (invented, seeded): one row a day of
the stable process ``y = 1 + 0.8·x1 − 0.5·x2 + ε`` (standard normal inputs and
errors); the chosen model is ``y ~ x1 + x2``, the larger candidate adds
``x1:x2``; the window is the last 90 days and the first run's window is the
baseline.  With ``--change slope`` the coefficient of x1 grows by 1 (one error
standard deviation per standard deviation of x1) after 60 nights, and the
script reports the nights to the first alert instead.
"""

from __future__ import annotations

import argparse
import datetime as dt
import logging
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.runs.run import run_monitor

START = dt.datetime(2030, 1, 1, tzinfo=dt.UTC)
SPEC = """
[history]
store = "sqlite:///history.sqlite"
[monitors.sim.source]
kind = "parquet"
path = "rows.parquet"
time_column = "day"
[monitors.sim.windows]
fresh = "90d"
[monitors.sim.family]
response = "y"
chosen = "additive"
[monitors.sim.family.candidates]
additive = "y ~ x1 + x2"
interaction = "y ~ x1 + x2 + x1:x2"
"""


def simulate(seed: int, nights: int, change: str | None, change_night: int,
             folder: Path) -> list[tuple[int, str, str]]:
    rng = np.random.default_rng(seed)
    days = 90 + nights
    x1, x2, noise = rng.standard_normal((3, days))
    y = 1 + 0.8 * x1 - 0.5 * x2 + noise
    if change == "slope":
        y = y + np.where(np.arange(days) >= 90 + change_night - 1, x1, 0.0)
    times = pd.date_range(START, periods=days, freq="D", tz="UTC")
    pd.DataFrame({"day": times, "x1": x1, "x2": x2, "y": y}).to_parquet(folder / "rows.parquet")
    (folder / "spec.toml").write_text(SPEC)
    openings = []
    for night in range(0, nights + 1):
        as_of = START + dt.timedelta(days=90 + night)
        outcome = run_monitor(folder / "spec.toml", "sim", as_of)
        if outcome.status != "completed":
            raise RuntimeError(f"night {night}: {outcome.reason}")
        for event in outcome.alert_events:
            if event["event"] == "opened":
                openings.append((night, event["kind"], event["model"]))
        if change and openings and openings[-1][0] >= change_night:
            break
    return openings


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--monitors", type=int, default=2)
    parser.add_argument("--years", type=float, default=1.0)
    parser.add_argument("--change", choices=("slope",), default=None)
    parser.add_argument("--first-seed", type=int, default=7000)
    options = parser.parse_args(argv)
    logging.basicConfig(level=logging.ERROR)
    warnings.simplefilter("ignore")
    started = time.perf_counter()
    nights = int(round(365 * options.years))
    total, kinds, delays = 0, {}, []
    for index in range(options.monitors):
        with tempfile.TemporaryDirectory() as folder:
            openings = simulate(options.first_seed + index, nights if not options.change
                                else 150, options.change, 60, Path(folder))
        if options.change:
            after = [o for o in openings if o[0] >= 60]
            delays.append(after[0][0] - 59 if after else None)
            print(f"monitor {index}: first alert after the change {after[:1]}", flush=True)
            continue
        total += len(openings)
        for _, kind, _ in openings:
            kinds[kind] = kinds.get(kind, 0) + 1
        print(f"monitor {index}: {len(openings)} alerts opened {openings}", flush=True)
    if options.change:
        print(f"delays (nights, None = not within 150): {delays}")
    else:
        years = options.monitors * options.years
        print(f"stable process: {years:g} monitor-years, {total} alerts opened, "
              f"{total / years:.2f} per monitor-year; by kind {kinds}")
    print(f"elapsed {time.perf_counter() - started:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
