"""A read-only view of one monitor's run ledger, for the scheduler, backfill and ``status``.

The ledger in the history store is the source of truth about which slots ran
(the scheduler's own job store is rebuilt at every start and never shared):
a slot is *completed* once a run of it was recorded completed; its failed
attempts stay visible with their reasons.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from storage.history import HistoryStore

from .spec import MonitorSpec

__all__ = ["LedgerView", "MonitorStatus", "read_ledger", "status_of"]


@dataclass(frozen=True, slots=True)
class LedgerView:
    """Finished attempts of one monitor, by slot (UTC instants).

    ``failed`` holds, for slots that never completed, the latest failure as
    ``"step: reason"``; ``first_slot`` is the earliest slot with a finished
    attempt; ``last_run`` the newest finished attempt as a plain dict (slot_at,
    status, finished_at, error_step, error_message) or None.
    """

    monitor: str
    completed: frozenset[dt.datetime] = frozenset()
    failed: Mapping[dt.datetime, str] = field(default_factory=dict)
    first_slot: dt.datetime | None = None
    last_run: Mapping[str, Any] | None = None

    @property
    def last_completed(self) -> dt.datetime | None:
        return max(self.completed) if self.completed else None


def _instant(value: Any) -> dt.datetime | None:
    if value is None or pd.isna(value):
        return None
    return pd.Timestamp(value).to_pydatetime().astimezone(dt.UTC)


def read_ledger(store: HistoryStore, monitor: str) -> LedgerView:
    """Read the finished attempts of ``monitor`` (one query)."""
    frame = store.runs(monitor)
    if frame.empty:
        return LedgerView(monitor)
    completed: set[dt.datetime] = set()
    failed: dict[dt.datetime, str] = {}
    for row in frame.itertuples(index=False):
        slot = _instant(row.slot_at)
        assert slot is not None  # slot_at is NOT NULL
        if row.status == "completed":
            completed.add(slot)
            failed.pop(slot, None)
        elif slot not in completed:
            failed[slot] = f"{row.error_step or 'run'}: {row.error_message or 'no reason given'}"
    newest = frame.sort_values(["finished_at", "run_id"]).iloc[-1]
    last_run = {
        "slot_at": _instant(newest["slot_at"]),
        "status": str(newest["status"]),
        "finished_at": _instant(newest["finished_at"]),
        "error_step": None if pd.isna(newest["error_step"]) else str(newest["error_step"]),
        "error_message": (None if pd.isna(newest["error_message"])
                          else str(newest["error_message"])),
    }
    first = _instant(frame["slot_at"].min())
    return LedgerView(monitor, frozenset(completed), failed, first, last_run)


@dataclass(frozen=True, slots=True)
class MonitorStatus:
    """Where one monitor stands at ``now``, from the ledger and its schedule.

    ``state`` is ``ok``, ``behind`` (the oldest slot without a completed run has
    waited longer than the grace), ``running`` (a slot is claimed right now and
    the monitor is not behind), ``new`` (scheduled, nothing recorded yet) or
    ``unscheduled``.  ``behind_seconds`` is how long the oldest pending slot has
    waited (0 when none is pending).
    """

    monitor: str
    state: str
    schedule: str | None
    last_run: Mapping[str, Any] | None
    last_completed: dt.datetime | None
    next_slot: dt.datetime | None
    oldest_pending: dt.datetime | None
    behind_seconds: float
    is_behind: bool
    running: Mapping[str, Any] | None
    open_alerts: Mapping[str, int]
    open_alert_kinds: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        def iso(value: Any) -> Any:
            return value.isoformat() if isinstance(value, dt.datetime) else value

        return {
            "monitor": self.monitor, "state": self.state, "schedule": self.schedule,
            "last_run": {k: iso(v) for k, v in self.last_run.items()} if self.last_run
            else None,
            "last_completed": iso(self.last_completed), "next_slot": iso(self.next_slot),
            "oldest_pending": iso(self.oldest_pending),
            "behind_seconds": round(self.behind_seconds, 3), "is_behind": self.is_behind,
            "running": {k: iso(v) for k, v in self.running.items()} if self.running else None,
            "open_alerts": dict(self.open_alerts),
            "open_alert_kinds": list(self.open_alert_kinds),
        }


def status_of(monitor: MonitorSpec, store: HistoryStore, *, now: dt.datetime) -> MonitorStatus:
    """The status of one monitor (reads the ledger, the latest slot's claim and open alerts)."""
    from .schedule import grace_of, lag_of, next_slot, previous_slot

    moment = now.astimezone(dt.UTC)
    ledger = read_ledger(store, monitor.name)
    alerts = store.alerts(monitor.name, state="open")
    counts = {str(k): int(v) for k, v in alerts["severity"].value_counts().items()} \
        if not alerts.empty else {}
    kinds = tuple(sorted(set(alerts["kind"]))) if not alerts.empty else ()
    schedule = monitor.schedule
    if schedule is None:
        return MonitorStatus(monitor.name, "unscheduled", None, ledger.last_run,
                             ledger.last_completed, None, None, 0.0, False, None, counts, kinds)
    oldest, waited = lag_of(monitor, ledger.completed, moment, since=ledger.first_slot)
    grace = grace_of(schedule)
    is_behind = waited > grace
    running = None
    latest = previous_slot(monitor, moment)
    for slot in {s for s in (latest, oldest) if s is not None}:
        row = store.slot_status(monitor.name, slot)
        if row is not None and row["status"] == "running" and row["lease_until"] > moment:
            running = {"slot_at": slot, "owner": row["owner"], "attempt": int(row["attempts"]),
                       "lease_until": row["lease_until"]}
    if is_behind:
        state = "behind"
    elif running is not None:
        state = "running"
    elif ledger.first_slot is None:
        state = "new"
    else:
        state = "ok"
    return MonitorStatus(monitor.name, state, f"{schedule.cron} ({schedule.timezone})",
                         ledger.last_run, ledger.last_completed, next_slot(monitor, moment),
                         oldest, waited.total_seconds(), is_behind, running, counts, kinds)
