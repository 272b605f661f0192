"""Helpers for the scheduling, serve, backfill and run-command tests.

The data written here are GENERATED TEST DATA: a seeded simulated linear process
(y = 1 + 2·x + 0.5·z + noise), nothing measured.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from monitor.runs.run import RunOutcome
from storage.history import HistoryStore, RunRecord

UTC = dt.UTC


def write_dataset(path: Path, *, start: dt.datetime, end: dt.datetime, seed: int = 20261202,
                  freq: str = "3h") -> pd.DataFrame:
    """Generated test data: a seeded linear process with one row every ``freq``."""
    rng = np.random.default_rng(seed)
    times = pd.date_range(start, end, freq=freq, tz="UTC", inclusive="left")
    n = len(times)
    x = rng.normal(size=n)
    z = rng.normal(size=n)
    y = 1.0 + 2.0 * x + 0.5 * z + rng.normal(scale=0.3, size=n)
    frame = pd.DataFrame({"at": times, "x": x, "z": z, "y": y})
    frame.to_parquet(path)
    return frame


def write_spec(folder: Path, *, cron: str | None = "30 2 * * *", timezone: str = "UTC",
               when_missed: str = "run_latest", grace: int = 120, fresh: str = "7d",
               store: str | None = None, store_env: str | None = None,
               table_prefix: str | None = None, monitors: tuple[str, ...] = ("load",),
               data: str = "data.parquet") -> Path:
    """A monitor spec (TOML) over ``data`` in ``folder``; returns its path."""
    history = ["[history]"]
    if store_env:
        history.append(f'store_env = "{store_env}"')
    else:
        history.append(f'store = "{store or "sqlite:///history.sqlite"}"')
    if table_prefix:
        history.append(f'table_prefix = "{table_prefix}"')
    parts = ["\n".join(history)]
    for name in monitors:
        parts.append(f"""
[monitors.{name}.source]
kind = "parquet"
path = "{data}"
time_column = "at"

[monitors.{name}.windows]
fresh = "{fresh}"

[monitors.{name}.family]
response = "y"
chosen = "both"
criterion = "aic"

[monitors.{name}.family.candidates]
only_x = "y ~ x"
both = "y ~ x + z"
""")
        if cron is not None:
            parts.append(f"""
[monitors.{name}.schedule]
cron = "{cron}"
timezone = "{timezone}"
when_missed = "{when_missed}"
late_start_grace_minutes = {grace}
""")
    path = folder / "spec.toml"
    path.write_text("\n".join(parts), encoding="utf-8")
    return path


def at(text: str) -> dt.datetime:
    """An ISO instant; naive text is UTC."""
    moment = dt.datetime.fromisoformat(text)
    return moment if moment.tzinfo else moment.replace(tzinfo=UTC)


class LedgerRun:
    """A stand-in for run_monitor that records through the real ledger, without statistics.

    It claims the slot, writes a run row in one transaction, and remembers each
    call; ``fail_slots`` fail with a data reason.
    """

    def __init__(self, fail_slots: tuple[dt.datetime, ...] = ()) -> None:
        self.calls: list[dt.datetime] = []
        self.fail_slots = set(fail_slots)

    def __call__(self, spec: Any, name: str, slot: dt.datetime, *, store: HistoryStore,
                 owner: str, now: dt.datetime | None = None) -> RunOutcome:
        self.calls.append(slot)
        claim = store.claim_slot(name, slot, owner, now=now)
        if claim is None:
            return RunOutcome(name, slot, "skipped", reason="recorded before or held elsewhere")
        record = RunRecord(window_start=slot - dt.timedelta(days=7), window_end=slot)
        if slot in self.fail_slots:
            run_id = store.fail_run(claim, "source", "no rows in the window", run=record,
                                    error_kind="source", now=now)
            return RunOutcome(name, slot, "failed", run_id, "source", "no rows in the window",
                              exit_code=3)
        run_id = store.complete_run(claim, record, now=now)
        return RunOutcome(name, slot, "completed", run_id)


def complete_slot(store: HistoryStore, monitor: str, slot: dt.datetime) -> None:
    """Record a completed run of ``slot`` directly in the ledger."""
    claim = store.claim_slot(monitor, slot, "setup:0")
    assert claim is not None
    store.complete_run(claim, RunRecord(window_start=slot - dt.timedelta(days=7),
                                        window_end=slot))
