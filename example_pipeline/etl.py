"""The INVENTED operator's own nightly job: load yesterday's readings, then let regwarden look.

This is what a user's pipeline looks like with regwarden in it: the job that
already loads the day's rows calls ``monitor.run_monitor`` at its end and acts on
the outcome (here it only prints; a real job might fail its task on exit code 1).

Run it for one day::

    python -m example_pipeline.etl WORKDIR 2024-03-05
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
from pathlib import Path

import monitor
from example_pipeline.generate import append_days, read_manifest

MONITOR = "district-heat"

__all__ = ["MONITOR", "nightly"]


def nightly(workdir: str | Path, day: dt.date, *, config: str | Path | None = None
            ) -> monitor.RunOutcome:
    """Append the readings of every day up to ``day`` (inclusive), then run the monitor.

    The run's slot is the midnight after ``day``, so its fresh window ends with
    ``day``: each night sees only the rows it would have seen.
    """
    workdir = Path(workdir)
    if read_manifest(workdir).written_through < day:
        append_days(workdir, day)
    as_of = dt.datetime.combine(day + dt.timedelta(days=1), dt.time(), tzinfo=dt.UTC)
    return monitor.run_monitor(config or workdir / "monitor.toml", MONITOR, as_of)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m example_pipeline.etl",
                                     description="one night of the invented operator's job")
    parser.add_argument("workdir", help="the demo's work folder (made by example_pipeline.demo)")
    parser.add_argument("day", help="the day whose readings arrived (ISO date)")
    options = parser.parse_args(argv)
    outcome = nightly(options.workdir, dt.date.fromisoformat(options.day))
    print(f"{outcome.monitor} {outcome.slot_at:%Y-%m-%d}: {outcome.status}"
          + (f" ({outcome.reason})" if outcome.reason else ""))
    return 0 if outcome.status != "failed" else 3


if __name__ == "__main__":
    sys.exit(main())
