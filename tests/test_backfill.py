"""Backfill: each replayed night sees only its own rows; resumable, idempotent, quiet off a TTY.

Runs are real ``run_monitor`` runs over GENERATED TEST DATA (a seeded simulated
linear process, one row every 3 hours from 2025-01-01 to 2025-03-01).
"""

from __future__ import annotations

import datetime as dt
import threading

import pandas as pd
import pytest
from _schedule_fixtures import at, write_dataset, write_spec

from monitor.errors import ConfigurationError
from monitor.runs._build import open_store
from monitor.runs.backfill import backfill, backfill_slots
from monitor.runs.ledger import read_ledger
from monitor.runs.run import run_monitor
from monitor.runs.spec import load_spec

DATA_START, DATA_END = at("2025-01-01"), at("2025-03-01")


@pytest.fixture
def setup(tmp_path):
    frame = write_dataset(tmp_path / "data.parquet", start=DATA_START, end=DATA_END)
    path = write_spec(tmp_path, cron="30 2 * * *", timezone="Europe/Berlin", fresh="7d")
    spec = load_spec(path)
    store = open_store(spec)
    yield spec, store, frame
    store.close()


class Counting:
    """run_monitor, counting its calls (and optionally stopping after some)."""

    def __init__(self, stop: threading.Event | None = None, after: int = 0) -> None:
        self.slots: list[dt.datetime] = []
        self.stop, self.after = stop, after

    def __call__(self, *args, **kwargs):  # type: ignore[no-untyped-def]
        outcome = run_monitor(*args, **kwargs)
        self.slots.append(outcome.slot_at)
        if self.stop is not None and len(self.slots) == self.after:
            self.stop.set()
        return outcome


def test_backfill_slots_follow_the_schedule_in_its_time_zone(setup):
    spec, _, _ = setup
    monitor = spec.monitor("load")
    # 02:30 Berlin = 01:30 UTC in winter (CET = UTC+1, Directive 2000/84/EC)
    slots = backfill_slots(monitor, "2025-02-01", "2025-02-04")
    assert slots == [at(f"2025-02-0{d}T01:30") for d in (1, 2, 3, 4)]
    assert backfill_slots(monitor, "2025-02-01", "2025-02-28", step=7) == [
        at(f"2025-02-{d:02d}T01:30") for d in (1, 8, 15, 22)]


def test_backfill_slots_without_a_schedule_are_midnights_utc(tmp_path):
    spec = load_spec(write_spec(tmp_path, cron=None))
    assert backfill_slots(spec.monitor("load"), "2025-02-01", "2025-02-03") == [
        at("2025-02-01"), at("2025-02-02"), at("2025-02-03")]


@pytest.mark.parametrize(("start", "end", "step", "match"), [
    ("2025-02-10", "2025-02-01", 1, "swap"),
    ("2025-02-31", "2025-03-01", 1, "--from"),
    ("2025-02-01", "2025-02-03", 0, "step"),
])
def test_bad_ranges_are_refused_with_a_hint(setup, start, end, step, match):
    spec, _, _ = setup
    with pytest.raises(ConfigurationError, match=match):
        backfill_slots(spec.monitor("load"), start, end, step=step)


def test_each_replayed_night_reads_only_the_rows_before_its_slot(setup):
    spec, store, frame = setup
    report = backfill(spec, "load", "2025-02-01", "2025-02-06", store=store, progress=False)
    assert (report.planned, report.completed, report.failed) == (6, 6, 0)
    runs = store.runs("load")
    assert list(runs["status"]) == ["completed"] * 6
    times = frame["at"]
    for row in runs.itertuples():
        # independent count of the rows in the half-open window [slot - 7 days, slot)
        expected = int(((times >= row.slot_at - pd.Timedelta(days=7))
                        & (times < row.slot_at)).sum())
        assert row.rows_read == expected
        assert row.watermark_at < row.slot_at
        assert row.window_end == row.slot_at


def test_backfill_is_idempotent(setup):
    spec, store, _ = setup
    first = backfill(spec, "load", "2025-02-01", "2025-02-04", store=store, progress=False)
    counting = Counting()
    again = backfill(spec, "load", "2025-02-01", "2025-02-04", store=store, progress=False,
                     run=counting)
    assert first.completed == 4
    assert (again.completed, again.already_recorded, counting.slots) == (0, 4, [])
    assert len(store.runs("load")) == 4


def test_a_stopped_backfill_resumes_where_it_stopped(setup):
    spec, store, _ = setup
    stop = threading.Event()
    counting = Counting(stop, after=3)
    stopped = backfill(spec, "load", "2025-02-01", "2025-02-08", store=store, progress=False,
                       run=counting, stop=stop)
    assert (stopped.completed, stopped.not_reached, stopped.stopped_early) == (3, 5, True)
    resumed = backfill(spec, "load", "2025-02-01", "2025-02-08", store=store, progress=False)
    assert (resumed.already_recorded, resumed.completed, resumed.not_reached) == (3, 5, 0)
    runs = store.runs("load")
    assert len(runs) == 8 and not runs["slot_at"].duplicated().any()


def test_failed_and_held_nights_are_counted_and_the_rest_still_run(setup):
    spec, store, _ = setup
    # a night held by a live claim of another process
    held = at("2025-01-03T01:30")
    assert store.claim_slot("load", held, "other-host:99") is not None
    # the data start on 2025-01-01: the night of 2025-01-01 01:30 has few rows; the
    # night of 2024-12-31 has none at all and fails with a data reason
    report = backfill(spec, "load", "2024-12-31", "2025-01-05", store=store, progress=False)
    assert report.held_elsewhere == 1 and "other-host:99" in report.failures[held.isoformat()]
    assert report.failed >= 1 and report.exit_code == 3
    assert report.completed + report.failed + report.held_elsewhere == report.planned
    ledger = read_ledger(store, "load")
    assert at("2025-01-05T01:30") in ledger.completed
    assert at("2024-12-31T01:30") in ledger.failed


def test_progress_shows_rate_and_time_left_on_request_and_nothing_otherwise(setup, capsys):
    spec, store, _ = setup
    backfill(spec, "load", "2025-02-01", "2025-02-02", store=store, progress=False)
    assert capsys.readouterr().err == ""
    backfill(spec, "load", "2025-02-03", "2025-02-04", store=store, progress=True)
    err = capsys.readouterr().err
    assert "backfill load" in err and "2/2" in err
    assert "left" in err and ("night/s" in err or "s/night" in err)


def test_progress_is_quiet_when_standard_error_is_not_a_terminal(setup, capsys):
    spec, store, _ = setup
    backfill(spec, "load", "2025-02-01", "2025-02-02", store=store)  # progress=None: auto
    assert capsys.readouterr().err == ""
