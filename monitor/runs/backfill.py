"""Backfill: replay a monitor's nightly runs over past data, so its trends start filled.

Each replayed night is an ordinary run for its slot: its window is the half-open
``[slot - fresh, slot)``, so it reads only rows whose time is before the slot,
the rows it would have seen that night (rows corrected later are read as they
are now: the source keeps no versions).  Nights run oldest first, so a monitor
without a fixed baseline takes its first replayed night as baseline.

The run ledger makes a backfill resumable and idempotent: slots completed
before (by an earlier backfill or by the scheduler) are not run again, and
stopping half-way (Ctrl-C finishes the night under way first) and starting the
same command again carries on where it stopped.  A night held by another
process (a live claim, e.g. of a backfill killed hard less than a lease ago) is
reported as such and can be run later.
"""

from __future__ import annotations

import datetime as dt
import logging
import signal
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

from storage.history import HistoryStore

from ..errors import ConfigurationError
from ._build import open_store
from .ledger import read_ledger
from .run import RunOutcome, default_owner, run_monitor
from .schedule import slots_between
from .spec import MonitorSpec, Spec, load_spec

__all__ = ["BackfillReport", "backfill", "backfill_slots"]

logger = logging.getLogger(__name__)

RunFunction = Callable[..., RunOutcome]


@dataclass(frozen=True, slots=True)
class BackfillReport:
    """What one backfill did.

    ``planned`` slots were in range (after ``step``); of these
    ``already_recorded`` had completed before and were not run again; the others
    ended ``completed``, ``failed`` or ``held_elsewhere``; ``not_reached`` were
    left when the backfill was stopped.  ``failures`` maps slot (ISO) to reason.
    """

    monitor: str
    first_slot: dt.datetime | None
    last_slot: dt.datetime | None
    planned: int
    already_recorded: int
    completed: int
    failed: int
    held_elsewhere: int
    not_reached: int
    elapsed_seconds: float
    failures: dict[str, str] = field(default_factory=dict)
    outcomes: tuple[RunOutcome, ...] = ()

    @property
    def stopped_early(self) -> bool:
        return self.not_reached > 0

    @property
    def exit_code(self) -> int:
        """The worst exit code among the failed runs (0 when none failed)."""
        return max((o.exit_code for o in self.outcomes if o.status == "failed"), default=0)

    def to_dict(self) -> dict[str, Any]:
        return {
            "monitor": self.monitor,
            "first_slot": self.first_slot.isoformat() if self.first_slot else None,
            "last_slot": self.last_slot.isoformat() if self.last_slot else None,
            "planned": self.planned, "already_recorded": self.already_recorded,
            "completed": self.completed, "failed": self.failed,
            "held_elsewhere": self.held_elsewhere, "not_reached": self.not_reached,
            "stopped_early": self.stopped_early,
            "elapsed_seconds": round(self.elapsed_seconds, 3),
            "failures": dict(self.failures),
        }


def _bound(value: dt.date | dt.datetime | str, zone: ZoneInfo, *, end: bool,
           where: str) -> dt.datetime:
    """A date means its whole local day (from its start, or up to the next day's start)."""
    if isinstance(value, str):
        try:
            value = (dt.datetime.fromisoformat(value) if "T" in value or " " in value.strip()
                     else dt.date.fromisoformat(value))
        except ValueError:
            raise ConfigurationError(f"{where} must be a date like 2025-01-31 or a date-time, "
                                     f"got {value!r}", where=where,
                                     hint="write an ISO date (YYYY-MM-DD)") from None
    if isinstance(value, dt.datetime):
        moment = value if value.tzinfo else value.replace(tzinfo=zone)
        return moment.astimezone(dt.UTC) + (dt.timedelta(microseconds=1) if end else
                                            dt.timedelta(0))
    day = value + dt.timedelta(days=1) if end else value
    return dt.datetime(day.year, day.month, day.day, tzinfo=zone).astimezone(dt.UTC)


def backfill_slots(monitor: MonitorSpec, start: dt.date | dt.datetime | str,
                   end: dt.date | dt.datetime | str, *, step: int = 1) -> list[dt.datetime]:
    """The slots a backfill from ``start`` to ``end`` (both included) replays.

    With a schedule: its cron slots in that range, dates read in the schedule's
    time zone.  Without one: one slot per day at 00:00 UTC (what ``regwarden run
    --as-of DATE`` uses).  ``step=7`` keeps every 7th slot, starting with the first.
    """
    if not isinstance(step, int) or step < 1:
        raise ConfigurationError(f"step must be a whole number of at least 1, got {step!r}",
                                 where="--step", hint="use 1 for every night, 7 for weekly")
    zone = ZoneInfo(monitor.schedule.timezone if monitor.schedule else "UTC")
    begin = _bound(start, zone, end=False, where="--from")
    finish = _bound(end, zone, end=True, where="--to")
    if finish <= begin:
        raise ConfigurationError(f"the backfill range ends ({end}) before it starts ({start})",
                                 where="--from/--to", hint="swap the two dates")
    if monitor.schedule is not None:
        slots = slots_between(monitor, begin, finish)
    else:
        first = begin.date() if begin.time() == dt.time(0) else begin.date() + \
            dt.timedelta(days=1)
        slots = []
        day = dt.datetime(first.year, first.month, first.day, tzinfo=dt.UTC)
        while day < finish:
            slots.append(day)
            day += dt.timedelta(days=1)
    return slots[::step]


class _Progress:
    """A tqdm bar on a terminal (rate and time left), nothing otherwise."""

    def __init__(self, total: int, monitor: str, enabled: bool) -> None:
        self.bar: Any = None
        if enabled:
            from tqdm import tqdm

            self.bar = tqdm(total=total, desc=f"backfill {monitor}", unit="night",
                            file=sys.stderr, dynamic_ncols=True, smoothing=0.1,
                            bar_format="{desc}: {percentage:3.0f}%|{bar}| {n_fmt}/{total_fmt} "
                            "[{elapsed} elapsed, {remaining} left, {rate_fmt}]{postfix}")

    def advance(self, counts: dict[str, int], *, timed: bool) -> None:
        if self.bar is None:
            return
        self.bar.set_postfix_str(", ".join(f"{k} {v}" for k, v in counts.items() if v),
                                 refresh=False)
        if timed:
            self.bar.update(1)
        else:  # recorded before: not part of the rate
            self.bar.total -= 1
            self.bar.refresh()

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def backfill(
    config: str | Path | Spec,
    name: str,
    start: dt.date | dt.datetime | str,
    end: dt.date | dt.datetime | str,
    *,
    step: int = 1,
    store: HistoryStore | None = None,
    run: RunFunction = run_monitor,
    owner: str | None = None,
    progress: bool | None = None,
    stop: threading.Event | None = None,
    handle_interrupt: bool = False,
) -> BackfillReport:
    """Replay the runs of monitor ``name`` for every slot from ``start`` to ``end``.

    Parameters
    ----------
    config, name
        The spec (path or parsed) and the monitor.
    start, end
        First and last day (both included; dates in the schedule's time zone),
        or exact instants.
    step
        Keep every ``step``-th slot (7 with a nightly schedule: weekly).
    store
        An open history store instead of the spec's.
    run
        The function that runs one slot (tests inject others).
    progress
        Show a progress bar on standard error: None (default) when standard
        error is a terminal, True/False to force.
    stop
        Set it to stop after the night under way (the rest is ``not_reached``).
    handle_interrupt
        Make the first Ctrl-C (SIGINT) set ``stop`` (the command line does);
        a second one interrupts at once.

    Returns
    -------
    BackfillReport
        Failed nights are recorded in the history with their reasons and
        counted; they do not stop the backfill.
    """
    spec = config if isinstance(config, Spec) else load_spec(config)
    monitor = spec.monitor(name)
    slots = backfill_slots(monitor, start, end, step=step)
    stop = stop if stop is not None else threading.Event()
    own_store = store is None
    history = open_store(spec) if store is None else store
    enabled = sys.stderr.isatty() if progress is None else progress
    bar = _Progress(len(slots), name, enabled)
    previous = _install_interrupt(stop) if handle_interrupt else None
    started = time.perf_counter()
    counts = {"completed": 0, "failed": 0, "held elsewhere": 0, "recorded before": 0}
    outcomes: list[RunOutcome] = []
    failures: dict[str, str] = {}
    reached = 0
    try:
        done = read_ledger(history, name).completed
        for slot in slots:
            if stop.is_set():
                break
            reached += 1
            if slot in done:
                counts["recorded before"] += 1
                bar.advance(counts, timed=False)
                continue
            outcome = run(spec, name, slot, store=history, owner=owner or default_owner())
            outcomes.append(outcome)
            if outcome.status == "completed":
                counts["completed"] += 1
            elif outcome.status == "failed":
                counts["failed"] += 1
                failures[slot.isoformat()] = f"{outcome.step}: {outcome.reason}"
            else:
                status = history.slot_status(name, slot)
                if status is not None and status["status"] == "completed":
                    counts["recorded before"] += 1
                else:
                    counts["held elsewhere"] += 1
                    holder = status["owner"] if status else "another process"
                    until = status["lease_until"].isoformat() if status else "?"
                    failures[slot.isoformat()] = (f"held by {holder} until {until}; run the "
                                                  "backfill again after that")
            bar.advance(counts, timed=True)
    finally:
        bar.close()
        if previous is not None:
            signal.signal(signal.SIGINT, previous)
        if own_store:
            history.close()
    report = BackfillReport(
        monitor=name, first_slot=slots[0] if slots else None,
        last_slot=slots[-1] if slots else None, planned=len(slots),
        already_recorded=counts["recorded before"], completed=counts["completed"],
        failed=counts["failed"], held_elsewhere=counts["held elsewhere"],
        not_reached=len(slots) - reached, elapsed_seconds=time.perf_counter() - started,
        failures=failures, outcomes=tuple(outcomes))
    logger.info("backfill of %r: %s", name, report.to_dict())
    return report


def _install_interrupt(stop: threading.Event) -> Any:
    if threading.current_thread() is not threading.main_thread():
        return None

    def handle(_signum: int, _frame: Any) -> None:
        if stop.is_set():
            raise KeyboardInterrupt
        stop.set()
        logger.warning("stopping after the night under way (Ctrl-C again to stop now); "
                       "run the same command again to resume")

    return signal.signal(signal.SIGINT, handle)

