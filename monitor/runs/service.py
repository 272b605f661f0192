"""The ``serve`` loop: every scheduled monitor on APScheduler 3.x, the ledger deciding.

How it works
------------
* At start the spec is read once and one job per scheduled monitor is (re)built
  in APScheduler's in-memory job store with the fixed id ``regwarden:<monitor>``
  and ``replace_existing=True``; nothing of the scheduler's own state persists.
  What must persist — which slots ran — lives in the run ledger of the history
  store (:mod:`monitor.runs.ledger`), which two ``serve`` processes may share:
  :meth:`storage.history.HistoryStore.claim_slot` hands each slot to exactly one
  of them.
* A job fires at each cron slot of its monitor (and once right at start, to
  catch up after downtime).  When it fires it does not trust the fire time: it
  reads the ledger and runs the slots :func:`monitor.runs.schedule.due_slots`
  names under the monitor's ``when_missed`` policy, oldest first.  A fire that
  comes late, twice, or after a backlog therefore runs each slot at most once.
* Our keys map onto the library's job options in :func:`job_options`, the one
  place that knows them: ``max_instances=1`` (a run longer than its interval
  never overlaps the next; a per-monitor lock guards the same in-process),
  ``coalesce`` on unless the policy is ``run_all`` (each fire drains the whole
  backlog anyway), and ``misfire_grace_time`` = ``late_start_grace_minutes``
  (the library's default of one second would drop every fire after a pause).
* A watchdog job compares the ledger with the schedule every few minutes (and at
  start) and raises a ``missed_runs`` alert for slots past their grace without a
  completed run that the policy will not run (never started, failed, or left
  out); each newly missed slot adds one sighting, an acknowledged alert stays so.
* SIGTERM or Ctrl-C: no new job starts and a catch-up loop stops after the slot
  under way; that run may finish within ``drain_seconds``.  A run still going
  after that is abandoned: nothing of it is written (a run is recorded in one
  transaction), its claim stays in the ledger until its lease runs out, and the
  next claim of the slot records that attempt as ``interrupted`` and runs it
  again.  A second Ctrl-C stops at once, with the same guarantee.
"""

from __future__ import annotations

import datetime as dt
import logging
import os
import signal
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from apscheduler.executors.pool import ThreadPoolExecutor
from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.schedulers.base import BaseScheduler
from apscheduler.triggers.base import BaseTrigger
from apscheduler.triggers.interval import IntervalTrigger

from storage.history import AlertRow, HistoryStore

from ..errors import ConfigurationError, RegwardenError
from ._build import open_store
from .ledger import read_ledger
from .run import RunOutcome, default_owner, run_monitor
from .schedule import DEFAULT_CATCH_UP_LIMIT, due_slots, missed_slots, next_slot
from .spec import MonitorSpec, ScheduleSpec, Spec, load_spec

__all__ = [
    "JOB_PREFIX",
    "WATCHDOG_JOB_ID",
    "MissedRuns",
    "Service",
    "SlotTrigger",
    "job_options",
    "scheduled_tick",
    "scheduled_watch",
]

logger = logging.getLogger(__name__)

JOB_PREFIX = "regwarden:"
WATCHDOG_JOB_ID = "regwarden:watchdog"
#: alert kind of missed scheduled runs (see monitor.runs.rules.ALERT_KINDS)
MISSED_KIND = "missed_runs"
#: the most missed slots one alert lists by name
_LISTED = 20

RunFunction = Callable[..., RunOutcome]

#: running services by key, so that scheduled jobs can be plain top-level functions
_SERVICES: dict[str, Service] = {}


def job_options(schedule: ScheduleSpec) -> dict[str, Any]:
    """Our schedule keys as APScheduler 3.x job options (the one place that maps them)."""
    return {
        "max_instances": 1,
        "coalesce": schedule.when_missed != "run_all",
        # at least a minute: the library refuses 0, and a fire is never exactly on time
        "misfire_grace_time": max(60, schedule.late_start_grace_minutes * 60),
    }


class SlotTrigger(BaseTrigger):
    """Fires at the slots of a :class:`ScheduleSpec` (the same arithmetic as the ledger's)."""

    __slots__ = ("schedule",)

    def __init__(self, schedule: ScheduleSpec) -> None:
        self.schedule = schedule

    def get_next_fire_time(self, previous_fire_time: dt.datetime | None,
                           now: dt.datetime) -> dt.datetime | None:
        # as the library's CronTrigger does: the first slot at or after ``now``, or, after a
        # fire, the first slot after it (even if that is already past: the scheduler then
        # applies its misfire grace and coalescing)
        tiny = dt.timedelta(microseconds=1)
        if previous_fire_time is None:
            return next_slot(self.schedule, now - tiny)
        start = min(now, previous_fire_time + tiny)
        if start == previous_fire_time:
            start += tiny
        return next_slot(self.schedule, start - tiny)

    def __str__(self) -> str:
        return f"slots[{self.schedule.cron} {self.schedule.timezone}]"

    def __repr__(self) -> str:
        return f"<SlotTrigger ({self.schedule.cron!r}, timezone={self.schedule.timezone!r})>"


@dataclass(frozen=True, slots=True)
class MissedRuns:
    """What the watchdog found for one monitor."""

    monitor: str
    missed: tuple[dt.datetime, ...]
    new: tuple[dt.datetime, ...]
    alert_id: int | None

    def to_dict(self) -> dict[str, Any]:
        return {"monitor": self.monitor, "missed": [s.isoformat() for s in self.missed],
                "new": [s.isoformat() for s in self.new], "alert_id": self.alert_id}


def scheduled_tick(service_key: str, monitor: str) -> None:
    """The scheduled job of one monitor (a top-level function with plain arguments)."""
    service = _SERVICES.get(service_key)
    if service is None:
        logger.warning("no running service %r: tick of %r ignored", service_key, monitor)
        return
    service.tick(monitor)


def scheduled_watch(service_key: str) -> None:
    """The watchdog job (a top-level function with plain arguments)."""
    service = _SERVICES.get(service_key)
    if service is not None:
        service.watch()


class Service:
    """Runs every scheduled monitor of one spec until told to stop.

    Parameters
    ----------
    config
        Path of the monitor spec, or a parsed :class:`Spec`.
    run
        The function that runs one slot (``run_monitor``; tests inject others).
    clock
        Returns the current aware instant (``datetime.now(UTC)`` by default).
    owner
        Name of this process in the ledger (default ``host:pid``).
    drain_seconds
        How long a run under way may go on after SIGTERM / Ctrl-C.
    watchdog_minutes
        How often the watchdog compares the ledger with the schedule.
    watch_days
        How far back the watchdog looks for missed slots.
    catch_up_limit
        Pending slots older than this are left to ``regwarden backfill``.
    store
        An open history store to use instead of the spec's.
    """

    def __init__(self, config: str | Path | Spec, *, run: RunFunction = run_monitor,
                 clock: Callable[[], dt.datetime] | None = None, owner: str | None = None,
                 drain_seconds: float = 600.0, watchdog_minutes: float = 5.0,
                 watch_days: float = 7.0, catch_up_limit: dt.timedelta = DEFAULT_CATCH_UP_LIMIT,
                 store: HistoryStore | None = None) -> None:
        self.config = config
        self.run = run
        self.clock = clock
        self.owner = owner
        self.drain_seconds = drain_seconds
        self.watchdog_minutes = watchdog_minutes
        self.watch_days = watch_days
        self.catch_up_limit = catch_up_limit
        self.store = store
        self._spec: Spec | None = None
        self._history: HistoryStore | None = None
        self._started_at: dt.datetime | None = None
        self._locks: dict[str, threading.Lock] = {}
        self._active: dict[str, dt.datetime] = {}
        self._active_changed = threading.Condition()
        self._stopping = threading.Event()
        self._stop_requested = threading.Event()
        self._key = f"{id(self):x}"

    # ------------------------------------------------------------------ plumbing

    def now(self) -> dt.datetime:
        moment = self.clock() if self.clock is not None else dt.datetime.now(dt.UTC)
        if moment.tzinfo is None:
            raise ConfigurationError("the service clock returned a naive datetime",
                                     where="Service(clock=...)",
                                     hint="return timezone-aware instants (UTC)")
        return moment.astimezone(dt.UTC)

    @property
    def spec(self) -> Spec:
        if self._spec is None:
            self._spec = self.config if isinstance(self.config, Spec) else \
                load_spec(self.config)
        return self._spec

    @property
    def history(self) -> HistoryStore:
        if self._history is None:
            self._history = self.store if self.store is not None else open_store(self.spec)
        return self._history

    @property
    def started_at(self) -> dt.datetime:
        if self._started_at is None:
            self._started_at = self.now()
        return self._started_at

    def scheduled(self) -> dict[str, MonitorSpec]:
        """The monitors that have a schedule, by name."""
        return {name: m for name, m in self.spec.monitors.items() if m.schedule is not None}

    def close(self) -> None:
        _SERVICES.pop(self._key, None)
        if self._history is not None and self.store is None:
            self._history.close()
        self._history = None

    @property
    def active_runs(self) -> dict[str, dt.datetime]:
        """Monitor -> slot of the runs under way in this process."""
        with self._active_changed:
            return dict(self._active)

    # ------------------------------------------------------------------ the work

    def tick(self, monitor: str, *, now: dt.datetime | None = None) -> list[RunOutcome]:
        """Run the slots of ``monitor`` that are due (oldest first); skip if already running.

        ``now`` fixes the instant the due slots are computed for (default: the
        clock).  A storage or configuration problem is logged and the service
        goes on; a run's own failure is recorded by the run itself.
        """
        lock = self._locks.setdefault(monitor, threading.Lock())
        if not lock.acquire(blocking=False):
            logger.info("monitor %r is still running its previous slot; this fire is skipped",
                        monitor)
            return []
        outcomes: list[RunOutcome] = []
        try:
            spec = self.spec.monitor(monitor)
            moment = now or self.now()
            ledger = read_ledger(self.history, monitor)
            for slot in due_slots(spec, ledger.completed, moment,
                                  catch_up_limit=self.catch_up_limit):
                if self._stopping.is_set():
                    logger.info("stopping: slot %s of %r left for the next start",
                                slot.isoformat(), monitor)
                    break
                with self._active_changed:
                    self._active[monitor] = slot
                try:
                    outcome = self.run(self.spec, monitor, slot, store=self.history,
                                       owner=self.owner or default_owner(),
                                       now=self.now() if self.clock is not None else None)
                finally:
                    with self._active_changed:
                        self._active.pop(monitor, None)
                        self._active_changed.notify_all()
                outcomes.append(outcome)
                logger.info("monitor %r slot %s: %s%s", monitor, slot.isoformat(),
                            outcome.status, f" ({outcome.reason})" if outcome.reason else "")
        except RegwardenError as error:
            logger.error("monitor %r: %s", monitor, error)
        finally:
            lock.release()
        return outcomes

    def watch(self, *, now: dt.datetime | None = None) -> list[MissedRuns]:
        """Compare the ledger with the schedule; alert once per newly missed slot."""
        moment = now or self.now()
        findings: list[MissedRuns] = []
        for name, monitor in self.scheduled().items():
            try:
                findings.append(self._watch_one(name, monitor, moment))
            except RegwardenError as error:
                logger.error("watchdog, monitor %r: %s", name, error)
        return findings

    def _watch_one(self, name: str, monitor: MonitorSpec, moment: dt.datetime) -> MissedRuns:
        assert monitor.schedule is not None
        ledger = read_ledger(self.history, name)
        known = [s for s in (ledger.first_slot, self.started_at) if s is not None]
        since = max(moment - dt.timedelta(days=self.watch_days), min(known))
        missed = missed_slots(monitor, ledger.completed, moment, since=since,
                              failed=ledger.failed, catch_up_limit=self.catch_up_limit)
        if not missed:
            return MissedRuns(name, (), (), None)
        reported = self._last_reported(name)
        new = tuple(s for s in missed if reported is None or s > reported)
        if not new:
            return MissedRuns(name, missed, (), None)
        zone = monitor.schedule.timezone
        shown = [f"{_local(s, zone)} ({ledger.failed.get(s, 'never started')})"
                 for s in missed[-_LISTED:]]
        message = (f"{len(missed)} scheduled run(s) of {name!r} have no result "
                   f"(policy {monitor.schedule.when_missed}, grace "
                   f"{monitor.schedule.late_start_grace_minutes} min): " + "; ".join(shown))
        evidence = {"missed": [s.isoformat() for s in missed[-_LISTED:]],
                    "count": len(missed), "latest_missed": missed[-1].isoformat(),
                    "failed": {s.isoformat(): ledger.failed[s] for s in missed[-_LISTED:]
                               if s in ledger.failed},
                    "when_missed": monitor.schedule.when_missed,
                    "late_start_grace_minutes": monitor.schedule.late_start_grace_minutes}
        ids = self.history.record_alerts(name, [AlertRow(
            model="", kind=MISSED_KIND, severity="warning", message=message,
            evidence=evidence)], now=moment)
        logger.warning("monitor %r: %s", name, message)
        return MissedRuns(name, missed, new, next(iter(ids.values()), None))

    def _last_reported(self, name: str) -> dt.datetime | None:
        alerts = self.history.alerts(name)
        if alerts.empty:
            return None
        rows = alerts[alerts["kind"] == MISSED_KIND]
        if rows.empty:
            return None
        evidence = rows.iloc[-1]["evidence"]
        latest = evidence.get("latest_missed") if isinstance(evidence, Mapping) else None
        return dt.datetime.fromisoformat(latest) if latest else None

    # ------------------------------------------------------------------ the scheduler

    def build_scheduler(self, scheduler: BaseScheduler | None = None, *,
                        catch_up_at_start: bool = True) -> BaseScheduler:
        """Add the jobs (fixed ids, replacing old ones) to ``scheduler`` (default: new)."""
        monitors = self.scheduled()
        if scheduler is None:
            scheduler = BackgroundScheduler(
                timezone=dt.UTC,
                executors={"default": ThreadPoolExecutor(max_workers=len(monitors) + 1)})
        _SERVICES[self._key] = self
        # the library schedules on the real clock (the injected one only decides which
        # slots are due when a job fires)
        moment = dt.datetime.now(dt.UTC)
        for name, monitor in monitors.items():
            assert monitor.schedule is not None
            options: dict[str, Any] = job_options(monitor.schedule)
            if catch_up_at_start:
                options["next_run_time"] = moment
            scheduler.add_job(scheduled_tick, trigger=SlotTrigger(monitor.schedule),
                              args=[self._key, name], id=f"{JOB_PREFIX}{name}",
                              name=f"regwarden monitor {name}", replace_existing=True,
                              **options)
        scheduler.add_job(scheduled_watch, trigger=IntervalTrigger(
            seconds=max(1.0, self.watchdog_minutes * 60.0), timezone=dt.UTC),
            args=[self._key], id=WATCHDOG_JOB_ID, name="regwarden watchdog",
            replace_existing=True, max_instances=1, coalesce=True, misfire_grace_time=None)
        return scheduler

    def request_stop(self) -> None:
        """Ask :meth:`serve` to stop (what SIGTERM and the first Ctrl-C do)."""
        self._stop_requested.set()

    def serve(self, *, install_signal_handlers: bool = True,
              on_ready: Callable[[Service], None] | None = None) -> bool:
        """Run until :meth:`request_stop` (or SIGTERM / Ctrl-C); True when it drained cleanly.

        False means a run was still going after ``drain_seconds``: the caller
        should end the process without waiting for it (the command line does).
        """
        scheduled = self.scheduled()
        if not scheduled:
            raise ConfigurationError(
                "no monitor of the spec has a schedule", where="monitors.*.schedule",
                hint="add [monitors.NAME.schedule] with cron = '30 2 * * *'")
        self.history.upgrade()
        _ = self.started_at
        previous = self._install_handlers() if install_signal_handlers else {}
        scheduler = self.build_scheduler()
        try:
            self.watch()
            scheduler.start()
            logger.info("serving %d monitor(s) from %s as %s: %s", len(scheduled),
                        self.spec.path, self.owner or default_owner(),
                        ", ".join(f"{n} [{m.schedule.cron if m.schedule else ''}]"
                                  for n, m in scheduled.items()))
            if on_ready is not None:
                on_ready(self)
            while not self._stop_requested.wait(0.5):
                pass
            logger.info("stopping: no new runs start now")
            self._stopping.set()
            scheduler.shutdown(wait=False)
            return self._drain()
        finally:
            for signum, handler in previous.items():
                signal.signal(signum, handler)
            _SERVICES.pop(self._key, None)

    def _drain(self) -> bool:
        deadline = time.monotonic() + self.drain_seconds
        with self._active_changed:
            while self._active:
                left = deadline - time.monotonic()
                if left <= 0:
                    for monitor, slot in self._active.items():
                        logger.warning(
                            "run of %r slot %s still going after %.0f s: abandoned; nothing "
                            "of it is written, and when its lease runs out the next claim "
                            "records it as interrupted and runs the slot again", monitor,
                            slot.isoformat(), self.drain_seconds)
                    return False
                logger.info("waiting up to %.0f s for %s to finish", left,
                            ", ".join(f"{m} slot {s.isoformat()}" for m, s in
                                      self._active.items()))
                self._active_changed.wait(min(left, 5.0))
        return True

    def _install_handlers(self) -> dict[int, Any]:
        if threading.current_thread() is not threading.main_thread():
            return {}
        signals = [signal.SIGINT, signal.SIGTERM]
        previous = {signum: signal.getsignal(signum) for signum in signals}

        def handle(signum: int, _frame: Any) -> None:
            if self._stop_requested.is_set() and signum == signal.SIGINT:
                logger.warning("second Ctrl-C: stopping now; the run under way writes nothing")
                os._exit(130)
            logger.info("%s received", signal.Signals(signum).name)
            self.request_stop()

        for signum in signals:
            signal.signal(signum, handle)
        return previous


def _local(slot: dt.datetime, zone: str) -> str:
    from zoneinfo import ZoneInfo

    return slot.astimezone(ZoneInfo(zone)).isoformat(timespec="minutes")

