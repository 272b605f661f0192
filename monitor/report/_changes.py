"""“What changed, and since when?”, assembled from the history store.

:func:`what_changed` compares a *reference night* with the *latest night* of a
monitor and lists, from stored values only:

- the first night each alert condition was seen (from the alert events);
- the nights on which the best candidate changed (from the verdicts);
- the checks that moved most between the two nights: first by how many steps
  their verdict moved (pass → warn → fail), then by the shift of
  ``−log10 p`` (p-values put checks with different statistics on one scale);
- the coefficients that moved most, in standard errors:
  ``(estimate_latest − estimate_reference) / std_error_reference``, the
  reference night's standard error.  Nightly windows usually overlap, so the two
  estimates are not independent and this is a yardstick, not a test;
- the estimated change, as the ``cusum`` check of the latest night stored it
  (``detail["change"]``: the row and its key, from
  ``monitor.stats.changepoint.estimate_change``).  The estimate is computed by
  the nightly run; this module only presents it.

The reference night is the last completed night before ``since``; without
``since`` (or with no night before it) it is the first night on record.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from ._views import json_value, nights_by_run, plain_value

__all__ = ["AlertSighting", "BestChange", "ChangeEstimate", "Changes", "CheckMove",
           "CoefficientMove", "what_changed"]

_VERDICT_STEP = {"pass": 0, "warn": 1, "fail": 2}


@dataclass(frozen=True, slots=True)
class AlertSighting:
    """When an alert condition was first seen (in the range asked for)."""

    kind: str
    segment: str
    model: str
    severity: str
    first_night: dt.datetime | None
    seen_before_range: bool
    state_now: str
    message: str


@dataclass(frozen=True, slots=True)
class BestChange:
    """A night on which another candidate became the best."""

    night: dt.datetime
    segment: str
    best_before: str | None
    best_now: str | None
    chosen: str | None


@dataclass(frozen=True, slots=True)
class CheckMove:
    """One check of one model, on the reference night and the latest night."""

    segment: str
    model: str
    check: str
    verdict_before: str
    verdict_now: str
    statistic_before: float | None
    statistic_now: float | None
    p_before: float | None
    p_now: float | None
    verdict_steps: int
    log10_p_shift: float | None


@dataclass(frozen=True, slots=True)
class CoefficientMove:
    """One coefficient of one model, reference night against latest night."""

    segment: str
    model: str
    term: str
    estimate_before: float | None
    estimate_now: float | None
    std_error_before: float | None
    shift_in_std_errors: float | None


@dataclass(frozen=True, slots=True)
class ChangeEstimate:
    """The change a ``cusum`` check estimated on the latest night.

    ``change_index`` is the row (0-based among the window's rows used) after which
    the change most likely happened; ``change_at`` is that row's key (a date-time
    when the key column is the time column).
    """

    segment: str
    model: str
    change_at: str | None
    change_index: int | None
    statistic: float | None
    p_value: float | None
    verdict: str
    source: str


@dataclass(frozen=True, slots=True)
class Changes:
    """Everything :func:`what_changed` found; empty tuples when the history holds nothing."""

    monitor: str
    since: dt.datetime | None
    reference_night: dt.datetime | None
    latest_night: dt.datetime | None
    alerts: tuple[AlertSighting, ...]
    best_changes: tuple[BestChange, ...]
    checks: tuple[CheckMove, ...]
    coefficients: tuple[CoefficientMove, ...]
    change_estimates: tuple[ChangeEstimate, ...]

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON data: instants as ISO 8601 UTC strings, non-finite numbers as None."""
        return json_value(dataclasses.asdict(self))  # type: ignore[no-any-return]


def _log10_p(p: float | None) -> float | None:
    if p is None or not math.isfinite(p) or p < 0:
        return None
    return -math.log10(max(p, 1e-300))


def _latest_and_reference(frame: Any, reference_run: int | None, latest_run: int | None
                          ) -> tuple[Any, Any]:
    if reference_run is None or latest_run is None or not len(frame):
        return frame.iloc[0:0], frame.iloc[0:0]
    return frame[frame["run_id"] == reference_run], frame[frame["run_id"] == latest_run]


def what_changed(store: Any, monitor: str, *, since: dt.datetime | None = None,
                 segment: str | None = None, top: int = 5) -> Changes:
    """Compare the reference night with the latest night of ``monitor`` (see the module notes).

    ``top`` limits the check and coefficient lists (the largest moves first).
    """
    runs = store.runs(monitor, status="completed")
    run_ids = [int(r) for r in runs["run_id"].tolist()]
    slots = [plain_value(s) for s in runs["slot_at"].tolist()]
    latest_run = run_ids[-1] if run_ids else None
    reference_run = run_ids[0] if run_ids else None
    if since is not None:
        before = [r for r, s in zip(run_ids, slots, strict=True) if s < since]
        if before:
            reference_run = before[-1]
    night = dict(zip(run_ids, slots, strict=True))
    return Changes(
        monitor=monitor, since=since,
        reference_night=night.get(reference_run) if reference_run is not None else None,
        latest_night=night.get(latest_run) if latest_run is not None else None,
        alerts=_alert_sightings(store, monitor, since, segment),
        best_changes=_best_changes(store, monitor, since, segment),
        checks=_check_moves(store, monitor, segment, reference_run, latest_run, top),
        coefficients=_coefficient_moves(store, monitor, segment, reference_run, latest_run, top),
        change_estimates=_change_estimates(store, monitor, segment, latest_run))


def _alert_sightings(store: Any, monitor: str, since: dt.datetime | None,
                     segment: str | None) -> tuple[AlertSighting, ...]:
    alerts = store.alerts(monitor)
    events = store.alert_events(monitor)
    night_of = nights_by_run(store, monitor)
    found = []
    for alert in alerts.itertuples(index=False):
        if segment is not None and alert.segment != segment:
            continue
        sightings = events[(events["alert_id"] == alert.alert_id) & events["run_id"].notna()]
        nights = sorted(night_of[int(r)] for r in sightings["run_id"].tolist()
                        if int(r) in night_of)
        in_range = [n for n in nights if since is None or n >= since]
        if not in_range:
            continue
        found.append(AlertSighting(
            kind=alert.kind, segment=alert.segment, model=alert.model, severity=alert.severity,
            first_night=in_range[0], seen_before_range=len(in_range) < len(nights),
            state_now=alert.state, message=alert.message))
    found.sort(key=lambda a: (a.first_night or dt.datetime.max.replace(tzinfo=dt.UTC), a.kind))
    return tuple(found)


def _best_changes(store: Any, monitor: str, since: dt.datetime | None,
                  segment: str | None) -> tuple[BestChange, ...]:
    verdicts = store.verdict_history(monitor, segment=segment)
    changes = []
    for row in verdicts[verdicts["changed"]].itertuples(index=False):
        moment = plain_value(row.slot_at)
        if since is not None and moment < since:
            continue
        changes.append(BestChange(moment, row.segment, plain_value(row.previous_best),
                                  plain_value(row.best_model), plain_value(row.chosen_model)))
    return tuple(changes)


def _check_moves(store: Any, monitor: str, segment: str | None, reference_run: int | None,
                 latest_run: int | None, top: int) -> tuple[CheckMove, ...]:
    checks = store.check_trend(monitor, None, segment=segment)
    before, now = _latest_and_reference(checks, reference_run, latest_run)
    earlier = {(r.segment, r.model, r.check_name): r for r in before.itertuples(index=False)}
    moves = []
    for row in now.itertuples(index=False):
        old = earlier.get((row.segment, row.model, row.check_name))
        if old is None:
            continue
        p_before, p_now = plain_value(old.p_value), plain_value(row.p_value)
        log_before, log_now = _log10_p(p_before), _log10_p(p_now)
        steps = _VERDICT_STEP.get(row.verdict, 0) - _VERDICT_STEP.get(old.verdict, 0)
        moves.append(CheckMove(
            segment=row.segment, model=row.model, check=row.check_name,
            verdict_before=old.verdict, verdict_now=row.verdict,
            statistic_before=plain_value(old.statistic), statistic_now=plain_value(row.statistic),
            p_before=p_before, p_now=p_now, verdict_steps=steps,
            log10_p_shift=(log_now - log_before) if log_now is not None and log_before is not None
            else None))
    moves.sort(key=lambda m: (-abs(m.verdict_steps), -abs(m.log10_p_shift or 0.0), m.check))
    return tuple(m for m in moves if m.verdict_steps or m.log10_p_shift)[:top]


def _coefficient_moves(store: Any, monitor: str, segment: str | None, reference_run: int | None,
                       latest_run: int | None, top: int) -> tuple[CoefficientMove, ...]:
    paths = store.coefficient_paths(monitor, segment=segment)
    before, now = _latest_and_reference(paths, reference_run, latest_run)
    earlier = {(r.segment, r.model, r.term): r for r in before.itertuples(index=False)}
    moves = []
    for row in now.itertuples(index=False):
        old = earlier.get((row.segment, row.model, row.term))
        if old is None:
            continue
        then, current = plain_value(old.estimate), plain_value(row.estimate)
        error = plain_value(old.std_error)
        shift = None
        if then is not None and current is not None and error:
            shift = (current - then) / error
        moves.append(CoefficientMove(row.segment, row.model, row.term, then, current, error,
                                     shift))
    moves.sort(key=lambda m: (-(abs(m.shift_in_std_errors) if m.shift_in_std_errors is not None
                                else -1.0), m.model, m.term))
    return tuple(moves[:top])


def _change_estimates(store: Any, monitor: str, segment: str | None,
                      latest_run: int | None) -> tuple[ChangeEstimate, ...]:
    if latest_run is None:
        return ()
    cusum = store.check_trend(monitor, "cusum", segment=segment, with_detail=True)
    found = []
    for row in cusum[cusum["run_id"] == latest_run].itertuples(index=False):
        detail: Mapping[str, Any] = row.detail if isinstance(row.detail, Mapping) else {}
        change = detail.get("change")
        if not isinstance(change, Mapping) or change.get("row") is None:
            continue
        index, change_at = change.get("row"), change.get("key")
        found.append(ChangeEstimate(
            segment=row.segment, model=row.model,
            change_at=str(change_at) if change_at is not None else None,
            change_index=int(index) if index is not None else None,
            statistic=plain_value(row.statistic), p_value=plain_value(row.p_value),
            verdict=row.verdict, source="cusum check of the latest night"))
    return tuple(found)
