"""Scheduling: cron slots (time zones, clock changes), missed-slot policies, the service.

Every instant is injected; nothing here waits on the wall clock except the one
APScheduler test, which waits (bounded, well under a second) for real threads.
"""

from __future__ import annotations

import datetime as dt
import threading
from pathlib import Path

import pytest
from _schedule_fixtures import LedgerRun, at, complete_slot, write_spec
from apscheduler.events import EVENT_JOB_MAX_INSTANCES

from monitor.errors import ConfigurationError
from monitor.runs._build import open_store
from monitor.runs.ledger import read_ledger, status_of
from monitor.runs.run import RunOutcome
from monitor.runs.schedule import (
    due_slots,
    lag_of,
    missed_slots,
    next_slot,
    plan_slots,
    previous_slot,
    slots_between,
)
from monitor.runs.service import (
    JOB_PREFIX,
    WATCHDOG_JOB_ID,
    Service,
    SlotTrigger,
    job_options,
)
from monitor.runs.spec import ScheduleSpec, load_spec

UTC = dt.UTC
NIGHTLY = ScheduleSpec("30 2 * * *", "UTC", "run_latest", 120)


def _policy(when_missed: str, grace: int = 120) -> ScheduleSpec:
    return ScheduleSpec("30 2 * * *", "UTC", when_missed, grace)


# ----------------------------------------------------------------------------- slots


def test_nightly_slot_in_berlin_moves_from_0130_to_0030_utc_across_spring_change():
    """One slot per night across 2025-03-30, when 02:00-03:00 local does not exist.

    Source of the offsets: EU summer time starts on the last Sunday of March at
    01:00 UTC (Directive 2000/84/EC), CET = UTC+1, CEST = UTC+2; 2025-03-30 is that
    Sunday.  02:30 on that night lies in the gap and is moved on by the gap (03:30
    CEST = 01:30 UTC), as Python's zoneinfo resolves it (PEP 495).
    """
    spec = ScheduleSpec("30 2 * * *", "Europe/Berlin")
    slots = slots_between(spec, at("2025-03-28"), at("2025-04-01"))
    assert slots == [at("2025-03-28T01:30"), at("2025-03-29T01:30"), at("2025-03-30T01:30"),
                     at("2025-03-31T00:30")]


def test_nightly_slot_in_berlin_runs_once_on_the_autumn_night_0230_occurs_twice():
    """2025-10-26: summer time ends at 01:00 UTC (Directive 2000/84/EC), so 02:30 local
    occurs at 00:30 UTC (CEST) and again at 01:30 UTC (CET); the first one counts."""
    spec = ScheduleSpec("30 2 * * *", "Europe/Berlin")
    slots = slots_between(spec, at("2025-10-25"), at("2025-10-28"))
    assert slots == [at("2025-10-25T00:30"), at("2025-10-26T00:30"), at("2025-10-27T01:30")]


def test_hourly_slots_on_the_autumn_change_day_skip_the_repeated_hour():
    """The local day of 2025-10-26 in Berlin is 25 hours long; a wall-clock hour that
    occurs twice counts once (documented in monitor.runs.schedule), so 24 slots."""
    spec = ScheduleSpec("0 * * * *", "Europe/Berlin")
    slots = slots_between(spec, at("2025-10-25T22:00"), at("2025-10-26T23:00"))
    assert len(slots) == 24
    assert len(set(slots)) == 24 and slots == sorted(slots)


@pytest.mark.parametrize(("cron", "start", "expected"), [
    # 2025-03-02 is a Sunday: day of week 0 and 7 both mean Sunday (classic cron)
    ("0 6 * * 0", "2025-03-01", ["2025-03-02T06:00", "2025-03-09T06:00"]),
    ("0 6 * * 7", "2025-03-01", ["2025-03-02T06:00", "2025-03-09T06:00"]),
    # both day fields restricted: either matches (the 1st, or any Monday)
    ("0 6 1 * 1", "2025-03-01", ["2025-03-01T06:00", "2025-03-03T06:00", "2025-03-10T06:00"]),
    # one restricted: both must match (Monday AND any day = Monday)
    ("0 6 * * 1-5", "2025-03-07", ["2025-03-07T06:00", "2025-03-10T06:00", "2025-03-11T06:00"]),
    ("*/20 6 * * *", "2025-03-01", ["2025-03-01T06:00", "2025-03-01T06:20", "2025-03-01T06:40"]),
], ids=["sunday-0", "sunday-7", "dom-or-dow", "weekdays", "steps"])
def test_cron_fields_follow_classic_cron(cron, start, expected):
    slots = slots_between(ScheduleSpec(cron), at(start), at(start) + dt.timedelta(days=14))
    assert slots[:len(expected)] == [at(e) for e in expected]


def test_next_and_previous_slot_and_an_impossible_date():
    assert next_slot(NIGHTLY, at("2025-01-01T02:30")) == at("2025-01-02T02:30")
    assert next_slot(NIGHTLY, at("2025-01-01T02:29:59")) == at("2025-01-01T02:30")
    assert previous_slot(NIGHTLY, at("2025-01-01T02:30")) == at("2025-01-01T02:30")
    assert previous_slot(NIGHTLY, at("2025-01-01T02:29")) == at("2024-12-31T02:30")
    assert next_slot(ScheduleSpec("0 0 31 2 *"), at("2025-01-01")) is None


def test_a_naive_now_is_refused_with_a_hint():
    with pytest.raises(ConfigurationError, match="naive"):
        due_slots(NIGHTLY, [], dt.datetime(2025, 1, 1))


def test_slot_trigger_fires_exactly_at_the_ledger_slots():
    spec = ScheduleSpec("30 2 * * *", "Europe/Berlin")
    trigger = SlotTrigger(spec)
    now = at("2025-03-27T12:00")
    fired = [trigger.get_next_fire_time(None, now)]
    for _ in range(5):  # as the scheduler asks: right after each fire
        fired.append(trigger.get_next_fire_time(fired[-1], fired[-1]))
    assert fired == slots_between(spec, now, at("2025-04-02T12:00"))
    # after a pause the next fire time may lie in the past (the misfire grace decides)
    assert trigger.get_next_fire_time(fired[0], at("2025-03-30T12:00")) == fired[1]


@pytest.mark.parametrize(("policy", "coalesce"), [("run_latest", True), ("run_all", False),
                                                  ("skip", True)])
def test_job_options_map_our_keys_onto_the_library_options(policy, coalesce):
    options = job_options(_policy(policy, grace=90))
    assert options == {"max_instances": 1, "coalesce": coalesce, "misfire_grace_time": 5400}
    # the library's default of 1 second is replaced even for a grace of 0
    assert job_options(_policy(policy, grace=0))["misfire_grace_time"] == 60


# ----------------------------------------------------------------------------- policies

MONDAY, TUESDAY, WEDNESDAY, THURSDAY = (at(f"2025-03-{d:02d}T02:30") for d in (3, 4, 5, 6))


@pytest.mark.parametrize(("policy", "due", "missed"), [
    ("run_latest", [THURSDAY], [TUESDAY, WEDNESDAY]),
    ("run_all", [TUESDAY, WEDNESDAY, THURSDAY], []),
    ("skip", [], [TUESDAY, WEDNESDAY, THURSDAY]),
])
def test_slots_missed_during_downtime_follow_the_policy(policy, due, missed):
    """Down from Monday's run until Thursday 10:00 (7.5 h after Thursday's slot)."""
    now = at("2025-03-06T10:00")
    schedule = _policy(policy)
    assert list(due_slots(schedule, [MONDAY], now)) == due
    assert list(missed_slots(schedule, [MONDAY], now, since=MONDAY)) == missed


@pytest.mark.parametrize("policy", ["run_latest", "run_all", "skip"])
def test_a_late_start_within_the_grace_still_runs(policy):
    schedule = _policy(policy, grace=120)
    assert due_slots(schedule, [WEDNESDAY], at("2025-03-06T04:29")) == (THURSDAY,)
    late = due_slots(schedule, [WEDNESDAY], at("2025-03-06T04:31"))
    assert late == (() if policy == "skip" else (THURSDAY,))


def test_a_grace_of_zero_still_lets_a_fire_a_few_seconds_late_run():
    assert due_slots(_policy("skip", grace=0), [WEDNESDAY],
                     at("2025-03-06T02:30:05")) == (THURSDAY,)


def test_an_on_time_slot_supersedes_older_late_ones_under_run_latest():
    """Hourly slots with a 2-hour grace after a 5-hour pause: the on-time ones run."""
    schedule = ScheduleSpec("0 * * * *", "UTC", "run_latest", 120)
    due = due_slots(schedule, [at("2025-03-06T03:00")], at("2025-03-06T08:30"))
    assert due == (at("2025-03-06T07:00"), at("2025-03-06T08:00"))


def test_a_monitor_that_never_ran_starts_with_a_slot_on_time():
    assert due_slots(NIGHTLY, [], at("2025-03-06T03:00")) == (THURSDAY,)
    assert due_slots(NIGHTLY, [], at("2025-03-06T10:00")) == ()
    assert lag_of(NIGHTLY, [], at("2025-03-06T10:00")) == (None, dt.timedelta(0))


def test_catch_up_is_limited_to_the_catch_up_window():
    schedule = _policy("run_all")
    due = due_slots(schedule, [at("2025-01-01T02:30")], at("2025-03-06T03:00"),
                    catch_up_limit=dt.timedelta(days=3))
    assert due == (at("2025-03-04T02:30"), WEDNESDAY, THURSDAY)


def test_plan_reports_the_lag_of_the_oldest_pending_slot():
    plan = plan_slots(_policy("run_latest"), [MONDAY], at("2025-03-06T10:00"),
                      watch_from=MONDAY)
    assert plan.oldest_pending == TUESDAY
    assert plan.behind_by == dt.timedelta(days=2, hours=7, minutes=30)
    assert plan.is_behind
    assert plan.latest_slot == THURSDAY and plan.next_slot == at("2025-03-07T02:30")
    on_time = plan_slots(_policy("run_latest"), [WEDNESDAY], at("2025-03-06T04:00"))
    assert on_time.behind_by == dt.timedelta(hours=1, minutes=30) and not on_time.is_behind


# ----------------------------------------------------------------------------- the service


@pytest.fixture
def spec_path(tmp_path: Path) -> Path:
    return write_spec(tmp_path, cron="30 2 * * *", when_missed="run_latest", grace=120)


def _service(config: Path | object, run: LedgerRun, clock_at: list[dt.datetime],
             **options: object) -> Service:
    return Service(config, run=run, clock=lambda: clock_at[0], owner="test:1",
                   **options)  # type: ignore[arg-type]


def test_cron_slots_fire_once_each_as_the_clock_moves(spec_path):
    clock = [at("2025-03-03T02:30:04")]
    run = LedgerRun()
    service = _service(spec_path, run, clock)
    try:
        assert [o.slot_at for o in service.tick("load")] == [MONDAY]
        clock[0] = at("2025-03-03T02:31")
        assert service.tick("load") == []  # completed: nothing due
        clock[0] = at("2025-03-04T02:30:01")
        assert [o.status for o in service.tick("load")] == ["completed"]
        assert run.calls == [MONDAY, TUESDAY]
        assert read_ledger(service.history, "load").completed == {MONDAY, TUESDAY}
    finally:
        service.close()


@pytest.mark.parametrize(("policy", "ran"), [("run_latest", [THURSDAY]),
                                             ("run_all", [TUESDAY, WEDNESDAY, THURSDAY]),
                                             ("skip", [])])
def test_a_restart_after_downtime_follows_the_policy_and_alerts_on_missed_nights(
        tmp_path, policy, ran):
    path = write_spec(tmp_path, when_missed=policy, grace=120)
    clock = [at("2025-03-06T10:00")]
    run = LedgerRun()
    service = _service(path, run, clock)
    try:
        complete_slot(service.history, "load", MONDAY)
        findings = service.watch()
        service.tick("load")
        assert run.calls == ran
        missed = {TUESDAY, WEDNESDAY, THURSDAY} - set(ran)
        assert set(findings[0].missed) == missed
        alerts = service.history.alerts("load", state="open")
        if missed:
            assert list(alerts["kind"]) == ["missed_runs"]
            assert alerts.iloc[0]["severity"] == "warning"
            assert alerts.iloc[0]["evidence"]["count"] == len(missed)
        else:
            assert alerts.empty
        # the watchdog sees the same missed nights again: no new sighting
        events_before = len(service.history.alert_events("load"))
        again = service.watch()
        assert again[0].new == ()
        assert len(service.history.alert_events("load")) == events_before
    finally:
        service.close()


def test_a_failed_night_is_reported_by_the_watchdog_with_its_reason(spec_path):
    clock = [at("2025-03-04T02:30:02")]
    run = LedgerRun(fail_slots=(TUESDAY,))
    service = _service(spec_path, run, clock)
    try:
        complete_slot(service.history, "load", MONDAY)
        assert [o.status for o in service.tick("load")] == ["failed"]
        clock[0] = at("2025-03-04T05:00")
        findings = service.watch()
        assert findings[0].new == (TUESDAY,)
        message = service.history.alerts("load").iloc[0]["message"]
        assert "no rows in the window" in message and "source" in message
        status = status_of(load_spec(spec_path).monitor("load"), service.history,
                           now=clock[0])
        assert status.state == "behind" and status.oldest_pending == TUESDAY
        assert status.open_alerts == {"warning": 1}
    finally:
        service.close()


def test_a_run_longer_than_its_interval_does_not_overlap_the_next_fire(tmp_path):
    """Every-minute schedule; the first run blocks; further fires of the same monitor skip."""
    path = write_spec(tmp_path, cron="* * * * *", grace=0)
    release, started = threading.Event(), threading.Event()
    calls: list[dt.datetime] = []

    def slow_run(spec, name, slot, *, store, owner, now=None):
        calls.append(slot)
        started.set()
        release.wait(5)
        return RunOutcome(name, slot, "completed")

    clock = [at("2025-03-06T10:00:01")]
    service = Service(path, run=slow_run, clock=lambda: clock[0], owner="test:1")
    try:
        worker = threading.Thread(target=service.tick, args=("load",))
        worker.start()
        assert started.wait(5)
        clock[0] = at("2025-03-06T10:01:01")  # the next slot is due while the first runs
        assert service.tick("load") == []
        assert service.active_runs == {"load": at("2025-03-06T10:00")}
        release.set()
        worker.join(5)
        assert calls == [at("2025-03-06T10:00")]
    finally:
        release.set()
        service.close()


def test_the_scheduler_has_fixed_job_ids_and_skips_a_fire_while_a_run_is_going(spec_path):
    """Real APScheduler threads: a second fire during a run is refused (max_instances=1)."""
    release, started = threading.Event(), threading.Event()

    def slow_run(spec, name, slot, *, store, owner, now=None):
        started.set()
        release.wait(5)
        return RunOutcome(name, slot, "completed")

    clock = [at("2025-03-06T02:30:02")]
    service = Service(spec_path, run=slow_run, clock=lambda: clock[0], owner="test:1")
    refused = threading.Event()
    scheduler = service.build_scheduler()
    scheduler.start(paused=True)
    scheduler = service.build_scheduler(scheduler)  # rebuilt: replaced, not duplicated
    try:
        assert sorted(job.id for job in scheduler.get_jobs()) == [f"{JOB_PREFIX}load",
                                                                  WATCHDOG_JOB_ID]
        job = scheduler.get_job(f"{JOB_PREFIX}load")
        assert (job.max_instances, job.coalesce, job.misfire_grace_time) == (1, True, 7200)
        assert job.args[1] == "load" and job.func.__name__ == "scheduled_tick"
        scheduler.add_listener(lambda event: refused.set(), EVENT_JOB_MAX_INSTANCES)
        scheduler.resume()
        assert started.wait(5)
        scheduler.modify_job(f"{JOB_PREFIX}load",
                             next_run_time=dt.datetime.now(UTC))
        assert refused.wait(5)
    finally:
        release.set()
        scheduler.shutdown(wait=True)
        service.close()


def test_stop_lets_the_run_under_way_finish_within_the_drain_time(spec_path):
    release, started = threading.Event(), threading.Event()
    run = LedgerRun()

    def slow_run(spec, name, slot, *, store, owner, now=None):
        started.set()
        release.wait(5)
        return run(spec, name, slot, store=store, owner=owner, now=now)

    clock = [at("2025-03-06T02:30:02")]
    service = Service(spec_path, run=slow_run, clock=lambda: clock[0], owner="test:1",
                      drain_seconds=10)
    result: list[bool] = []
    thread = threading.Thread(target=lambda: result.append(
        service.serve(install_signal_handlers=False)))
    try:
        thread.start()
        assert started.wait(5)
        service.request_stop()
        threading.Timer(0.3, release.set).start()
        thread.join(10)
        assert result == [True]
        assert read_ledger(service.history, "load").completed == {THURSDAY}
    finally:
        release.set()
        service.close()


def test_stop_abandons_a_run_that_outlasts_the_drain_time_and_writes_nothing(spec_path):
    release, started = threading.Event(), threading.Event()

    def stuck_run(spec, name, slot, *, store, owner, now=None):
        claim = store.claim_slot(name, slot, owner, now=now)
        started.set()
        release.wait(5)
        return RunOutcome(name, slot, "skipped" if claim is None else "completed")

    clock = [at("2025-03-06T02:30:02")]
    service = Service(spec_path, run=stuck_run, clock=lambda: clock[0], owner="test:1",
                      drain_seconds=0.2)
    result: list[bool] = []
    thread = threading.Thread(target=lambda: result.append(
        service.serve(install_signal_handlers=False)))
    try:
        thread.start()
        assert started.wait(5)
        service.request_stop()
        thread.join(10)
        assert result == [False]
        slot = service.history.slot_status("load", THURSDAY)
        assert slot is not None and slot["status"] == "running"
        assert service.history.runs("load").empty
    finally:
        release.set()
        service.close()


def test_serve_refuses_a_spec_without_any_schedule(tmp_path):
    path = write_spec(tmp_path, cron=None)
    service = Service(path)
    with pytest.raises(ConfigurationError, match="schedule"):
        service.serve(install_signal_handlers=False)
    service.close()


def test_status_of_a_new_and_an_unscheduled_monitor(tmp_path):
    path = write_spec(tmp_path, monitors=("load",))
    spec = load_spec(path)
    store = open_store(spec)
    try:
        status = status_of(spec.monitor("load"), store, now=at("2025-03-06T10:00"))
        assert (status.state, status.is_behind, status.next_slot) == (
            "new", False, at("2025-03-07T02:30"))
    finally:
        store.close()
