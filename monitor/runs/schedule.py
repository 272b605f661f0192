"""Slot arithmetic: which instants a monitor's schedule names, and which of them are due.

A *slot* is one scheduled instant of a monitor, kept in UTC; the run ledger in
the history store is keyed by it.  Everything here is pure: "now" and the
ledger's completed slots arrive as arguments, nothing reads a clock or a store.

Cron lines
----------
Five fields, ``minute hour day-of-month month day-of-week``, read as classic
cron does: lists ``a,b``, ranges ``a-b``, steps ``*/n`` and ``a-b/n`` (``a/n``
means ``a``-max every ``n``), day of week 0-7 with both 0 and 7 for Sunday.
When both day fields are restricted (neither starts with ``*``) a day matches
if *either* does, as in classic cron; otherwise both must.

Time zones and clock changes
----------------------------
Slots are wall-clock times in the schedule's IANA time zone, turned into UTC:

* a wall-clock time that does not exist (spring forward) is moved on by the
  length of the gap, as Python's ``zoneinfo`` resolves it: ``02:30`` on the
  night Central Europe skips 02:00-03:00 becomes ``03:30`` summer time, so a
  nightly job still runs once that night;
* a wall-clock time that occurs twice (fall back) counts once, at its first
  occurrence;
* two wall-clock times that land on the same instant count once.

Missed slots
------------
A slot is *on time* while ``now - slot <= late_start_grace_minutes`` and *late*
after that (a grace below one minute counts as one minute: no scheduler fires
exactly on the second, and a grace of 0 would make every start late).  Slots
after the latest completed one (and within ``catch_up_limit``) that have not
completed are pending; on-time ones always run; late ones follow the monitor's
``when_missed`` policy:

``run_latest``
    run only the newest late slot, and only when no on-time slot supersedes it;
``run_all``
    run every late slot, oldest first;
``skip``
    run none of them.

A late slot the policy does not run is *missed*; the service's watchdog turns
missed slots into an alert.  A monitor that never completed a run starts with
its next slot (or one still within its grace): its past is what ``backfill``
is for.
"""

from __future__ import annotations

import datetime as dt
import functools
from collections.abc import Collection, Iterable, Iterator
from dataclasses import dataclass
from zoneinfo import ZoneInfo

from ..errors import ConfigurationError
from .spec import MonitorSpec, ScheduleSpec

__all__ = [
    "DEFAULT_CATCH_UP_LIMIT",
    "SlotPlan",
    "due_slots",
    "grace_of",
    "lag_of",
    "missed_slots",
    "next_slot",
    "plan_slots",
    "previous_slot",
    "slots_between",
]

#: How far back the scheduler looks for pending slots after downtime (older: use backfill).
DEFAULT_CATCH_UP_LIMIT = dt.timedelta(days=31)

#: How far ahead :func:`next_slot` searches (a 29 February on a Monday recurs within 28 years).
_SEARCH_DAYS = 366 * 29

_FIELDS = (("minute", 0, 59), ("hour", 0, 23), ("day of month", 1, 31), ("month", 1, 12),
           ("day of week", 0, 7))
_TINY = dt.timedelta(microseconds=1)


@dataclass(frozen=True, slots=True)
class _Cron:
    minutes: tuple[int, ...]
    hours: tuple[int, ...]
    days: frozenset[int]
    months: frozenset[int]
    weekdays: frozenset[int]  # 0 = Sunday ... 6 = Saturday (cron numbering)
    days_restricted: bool
    weekdays_restricted: bool

    def matches(self, day: dt.date) -> bool:
        if day.month not in self.months:
            return False
        in_month = day.day in self.days
        in_week = day.isoweekday() % 7 in self.weekdays
        if self.days_restricted and self.weekdays_restricted:
            return in_month or in_week
        return in_month and in_week


def _expand(text: str, label: str, low: int, high: int, cron: str) -> frozenset[int]:
    values: set[int] = set()
    for part in text.split(","):
        body, _, step_text = part.partition("/")
        try:
            step = int(step_text) if step_text else 1
            if body == "*":
                first, last = low, high
            elif "-" in body:
                first_text, last_text = body.split("-")
                first, last = int(first_text), int(last_text)
            else:
                first = int(body)
                last = high if step_text else first
        except ValueError:
            raise ConfigurationError(f"cron line {cron!r}: {part!r} is not valid in the "
                                     f"{label} field", where="schedule.cron",
                                     hint="use numbers, ranges a-b, lists a,b, steps */n or *"
                                     ) from None
        if step < 1 or not low <= first <= high or not low <= last <= high or last < first:
            raise ConfigurationError(f"cron line {cron!r}: {part!r} is out of range in the "
                                     f"{label} field ({low}-{high})", where="schedule.cron",
                                     hint="write ranges low-high within the field's bounds")
        values.update(range(first, last + 1, step))
    return frozenset(values)


@functools.lru_cache(maxsize=256)
def _parse_cron(cron: str) -> _Cron:
    fields = cron.split()
    if len(fields) != 5:
        raise ConfigurationError(f"cron line {cron!r} must have 5 fields (minute hour "
                                 "day-of-month month day-of-week)", where="schedule.cron",
                                 hint="for example '30 2 * * *' runs at 02:30 daily")
    sets = [_expand(text, label, low, high, cron)
            for text, (label, low, high) in zip(fields, _FIELDS, strict=True)]
    weekdays = frozenset(day % 7 for day in sets[4])
    return _Cron(tuple(sorted(sets[0])), tuple(sorted(sets[1])), sets[2], sets[3], weekdays,
                 not fields[2].startswith("*"), not fields[4].startswith("*"))


def grace_of(schedule: ScheduleSpec | MonitorSpec) -> dt.timedelta:
    """How late a slot may start and still count as on time (at least one minute)."""
    minutes = _schedule_of(schedule).late_start_grace_minutes
    return max(dt.timedelta(minutes=minutes), dt.timedelta(minutes=1))


def _schedule_of(schedule: ScheduleSpec | MonitorSpec) -> ScheduleSpec:
    if isinstance(schedule, MonitorSpec):
        if schedule.schedule is None:
            raise ConfigurationError(f"monitor {schedule.name!r} has no schedule",
                                     where=f"monitors.{schedule.name}.schedule",
                                     hint="add a [monitors.NAME.schedule] table with a cron "
                                     "line, or run it with `regwarden run`")
        return schedule.schedule
    return schedule


def _aware(moment: dt.datetime, name: str) -> dt.datetime:
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise ConfigurationError(f"{name} is a naive datetime ({moment.isoformat()})",
                                 where=name, hint="pass a timezone-aware datetime (UTC)")
    return moment.astimezone(dt.UTC)


def _day_slots(cron: _Cron, zone: ZoneInfo, day: dt.date) -> list[dt.datetime]:
    """The UTC slots of one local calendar day, sorted and without duplicates."""
    if not cron.matches(day):
        return []
    found: set[dt.datetime] = set()
    for hour in cron.hours:
        for minute in cron.minutes:
            local = dt.datetime(day.year, day.month, day.day, hour, minute, tzinfo=zone)
            # fold=0: the first of two occurrences; in a gap, the offset from before it
            found.add(local.astimezone(dt.UTC))
    return sorted(found)


def _iter_slots(schedule: ScheduleSpec, after: dt.datetime,
                days: int = _SEARCH_DAYS) -> Iterator[dt.datetime]:
    """Slots strictly after ``after`` (UTC), in order, for at most ``days`` local days."""
    cron = _parse_cron(schedule.cron)
    zone = ZoneInfo(schedule.timezone)
    # a gap slot can land on the next local day: start one day early
    day = after.astimezone(zone).date() - dt.timedelta(days=1)
    for _ in range(days):
        for slot in _day_slots(cron, zone, day):
            if slot > after:
                yield slot
        day += dt.timedelta(days=1)


def slots_between(schedule: ScheduleSpec | MonitorSpec, start: dt.datetime,
                  end: dt.datetime) -> list[dt.datetime]:
    """Every slot ``s`` of the schedule with ``start <= s < end`` (half-open), in UTC."""
    spec = _schedule_of(schedule)
    begin, finish = _aware(start, "start"), _aware(end, "end")
    if finish <= begin:
        return []
    span = (finish - begin).days + 3
    slots: list[dt.datetime] = []
    for slot in _iter_slots(spec, begin - _TINY, span):
        if slot >= finish:
            break
        slots.append(slot)
    return slots


def next_slot(schedule: ScheduleSpec | MonitorSpec, after: dt.datetime) -> dt.datetime | None:
    """The first slot strictly after ``after`` (None if the line never fires, e.g. 31 Feb)."""
    return next(_iter_slots(_schedule_of(schedule), _aware(after, "after")), None)


def previous_slot(schedule: ScheduleSpec | MonitorSpec, at: dt.datetime, *,
                  within: dt.timedelta = dt.timedelta(days=400)) -> dt.datetime | None:
    """The last slot at or before ``at`` (looking back at most ``within``)."""
    spec = _schedule_of(schedule)
    moment = _aware(at, "at")
    cron = _parse_cron(spec.cron)
    zone = ZoneInfo(spec.timezone)
    # walk back day by day (a gap slot can land on the next local day: start one day late)
    day = moment.astimezone(zone).date() + dt.timedelta(days=1)
    for _ in range(within.days + 3):
        earlier = [slot for slot in _day_slots(cron, zone, day) if slot <= moment]
        if earlier:
            found = earlier[-1]
            return found if moment - found <= within else None
        day -= dt.timedelta(days=1)
    return None


@dataclass(frozen=True, slots=True)
class SlotPlan:
    """What the schedule asks for at one instant.

    ``due`` are the slots to run now (oldest first); ``missed`` the late ones the
    policy leaves out (between ``watch_from`` and now); ``latest_slot`` the last
    slot at or before now and ``next_slot`` the first one after it; ``behind_by``
    how long the oldest pending slot has waited (zero when none is pending) and
    ``is_behind`` whether that exceeds the grace.
    """

    now: dt.datetime
    due: tuple[dt.datetime, ...]
    missed: tuple[dt.datetime, ...]
    latest_slot: dt.datetime | None
    next_slot: dt.datetime | None
    oldest_pending: dt.datetime | None
    behind_by: dt.timedelta
    is_behind: bool


def _pending(spec: ScheduleSpec, completed: Collection[dt.datetime], now: dt.datetime,
             catch_up_limit: dt.timedelta) -> tuple[list[dt.datetime], list[dt.datetime]]:
    """(on-time, late) slots after the latest completed one that have not completed."""
    grace = grace_of(spec)
    lower = now - catch_up_limit
    anchor = max(completed) if completed else None
    if anchor is None:
        start = now - grace  # a monitor that never ran starts with a slot on time
    else:
        start = max(anchor, lower)
    slots = [s for s in slots_between(spec, max(start, lower), now + _TINY)
             if s > start and s not in completed]
    on_time = [s for s in slots if now - s <= grace]
    late = [s for s in slots if now - s > grace]
    return on_time, late


def _completed_set(completed: Iterable[dt.datetime]) -> frozenset[dt.datetime]:
    return frozenset(_aware(slot, "completed slot") for slot in completed)


def due_slots(schedule: ScheduleSpec | MonitorSpec, completed: Iterable[dt.datetime],
              now: dt.datetime, *,
              catch_up_limit: dt.timedelta = DEFAULT_CATCH_UP_LIMIT) -> tuple[dt.datetime, ...]:
    """The slots to run now, oldest first, under the schedule's ``when_missed`` policy.

    Parameters
    ----------
    schedule
        A monitor (its ``schedule``) or a schedule.
    completed
        The slots the run ledger holds as completed (aware instants).
    now
        The current instant.
    catch_up_limit
        Pending slots older than this are left to ``backfill``.
    """
    spec = _schedule_of(schedule)
    moment = _aware(now, "now")
    on_time, late = _pending(spec, _completed_set(completed), moment, catch_up_limit)
    if spec.when_missed == "run_all":
        return tuple(late + on_time)
    if spec.when_missed == "run_latest" and late and not on_time:
        return (late[-1],)
    return tuple(on_time)


def missed_slots(schedule: ScheduleSpec | MonitorSpec, completed: Iterable[dt.datetime],
                 now: dt.datetime, *, since: dt.datetime | None,
                 failed: Iterable[dt.datetime] = (),
                 catch_up_limit: dt.timedelta = DEFAULT_CATCH_UP_LIMIT
                 ) -> tuple[dt.datetime, ...]:
    """Late slots at or after ``since`` that have no completed run: nights without results.

    A late slot counts unless it is due now and was never tried (a catch-up that
    is about to run it); a slot in ``failed`` (a failed attempt) counts even when
    the policy will try it again.  ``since=None`` means nothing counts (a
    monitor with no history and no running service).
    """
    if since is None:
        return ()
    spec = _schedule_of(schedule)
    moment = _aware(now, "now")
    done = _completed_set(completed)
    tried = _completed_set(failed)
    grace = grace_of(spec)
    due = set(due_slots(spec, done, moment, catch_up_limit=catch_up_limit)) - tried
    begin = _aware(since, "since")
    return tuple(s for s in slots_between(spec, begin, moment - grace)
                 if s not in done and s not in due and moment - s > grace)


def lag_of(schedule: ScheduleSpec | MonitorSpec, completed: Iterable[dt.datetime],
           now: dt.datetime, *, since: dt.datetime | None = None
           ) -> tuple[dt.datetime | None, dt.timedelta]:
    """The oldest pending slot and how long it has waited (not capped by any limit).

    Pending: the first slot after the latest completed one (or, when none
    completed, the first at or after ``since``), if it is not after ``now``.
    Without a completed slot and without ``since`` nothing is pending (the
    monitor has not started).
    """
    spec = _schedule_of(schedule)
    moment = _aware(now, "now")
    done = _completed_set(completed)
    if done:
        oldest = next_slot(spec, max(done))
    elif since is not None:
        oldest = next_slot(spec, _aware(since, "since") - _TINY)
    else:
        return None, dt.timedelta(0)
    if oldest is None or oldest > moment:
        return None, dt.timedelta(0)
    return oldest, moment - oldest


def plan_slots(schedule: ScheduleSpec | MonitorSpec, completed: Iterable[dt.datetime],
               now: dt.datetime, *, watch_from: dt.datetime | None = None,
               failed: Iterable[dt.datetime] = (),
               catch_up_limit: dt.timedelta = DEFAULT_CATCH_UP_LIMIT) -> SlotPlan:
    """Everything the service and ``status`` need about one monitor at ``now``."""
    spec = _schedule_of(schedule)
    moment = _aware(now, "now")
    done = _completed_set(completed)
    grace = grace_of(spec)
    oldest, waited = lag_of(spec, done, moment, since=watch_from)
    return SlotPlan(
        now=moment,
        due=due_slots(spec, done, moment, catch_up_limit=catch_up_limit),
        missed=missed_slots(spec, done, moment, since=watch_from, failed=failed,
                            catch_up_limit=catch_up_limit),
        latest_slot=previous_slot(spec, moment),
        next_slot=next_slot(spec, moment),
        oldest_pending=oldest,
        behind_by=waited,
        is_behind=waited > grace,
    )
