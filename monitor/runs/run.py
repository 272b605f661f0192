"""One monitoring run: spec → source → family → checks → rules → history → delivery.

``run_monitor(config, name, as_of=None)`` resolves the fresh window for
``as_of`` (half-open ``[as_of − fresh, as_of)``), claims the slot in the run
ledger (a slot completed before is a no-op), reads the window, evaluates the
family on it (pass 1, fits, verdict, pass 2 with every candidate's checks and
drift; per segment when the monitor has a segment column), advances the
sequential watch on the rows that are new since the last run, turns the
findings into alerts (:mod:`monitor.runs.alerting`, :mod:`monitor.runs.rules`),
and writes every result row, the alerts and the run's grouped messages together
with the run's status in ONE transaction.  Then the monitor's undelivered
messages (tonight's and any left from earlier runs) are sent.

A failure at any step is recorded as a failed run with its step and reason, and
becomes a data-problem alert (written with the failed run, in its transaction)
that the next completed run clears; the slot can be run again.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import getpass
import logging
import math
import os
import socket
import time
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from storage.history import (
    AlertRow,
    BaselineRow,
    CheckRow,
    CoefficientRow,
    ComparisonRow,
    DeliveryRow,
    HistoryStore,
    MetricRow,
    RunRecord,
    VerdictRow,
)

from .._frames import arrow_to_columns
from ..errors import ModelFitError, RegwardenError
from . import alerting
from ._build import open_source, open_store
from .rules import Condition
from .spec import MonitorSpec, Spec, load_spec

__all__ = ["RunOutcome", "default_owner", "run_monitor", "slot_of"]

logger = logging.getLogger(__name__)

#: metrics stored per model and segment (long form: one row each)
FIT_METRICS = ("n", "rank", "r_squared", "adj_r_squared", "f_statistic", "f_pvalue", "sigma",
               "ss_model", "ss_resid", "log_likelihood", "aic", "bic", "aicc")
RANKING_METRICS = ("delta", "weight")


@dataclass(frozen=True, slots=True)
class RunOutcome:
    """What one call of :func:`run_monitor` did for one monitor."""

    monitor: str
    slot_at: dt.datetime
    status: str  # "completed", "failed" or "skipped" (slot recorded before / held elsewhere)
    run_id: int | None = None
    step: str | None = None
    reason: str | None = None
    window_start: dt.datetime | None = None
    window_end: dt.datetime | None = None
    rows_read: int = 0
    rows_dropped: int = 0
    verdicts: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)
    exit_code: int = 0
    #: the run's alert events (opened, escalated, reminder, resolved), as plain dicts
    alert_events: tuple[Mapping[str, Any], ...] = ()
    #: alerts of the monitor still active (open, acknowledged or snoozed) after the run
    active_alerts: int = 0
    #: what the delivery after the run did: delivered / failed message counts and errors
    delivery: Mapping[str, Any] = field(default_factory=dict)

    @property
    def alerts_opened(self) -> tuple[str, ...]:
        return tuple(e["alert"] for e in self.alert_events if e["event"] == "opened")

    @property
    def alerts_resolved(self) -> tuple[str, ...]:
        return tuple(e["alert"] for e in self.alert_events if e["event"] == "resolved")

    def to_dict(self) -> dict[str, Any]:
        return {
            "monitor": self.monitor, "slot_at": self.slot_at.isoformat(), "status": self.status,
            "run_id": self.run_id, "step": self.step, "reason": self.reason,
            "window_start": self.window_start.isoformat() if self.window_start else None,
            "window_end": self.window_end.isoformat() if self.window_end else None,
            "rows_read": self.rows_read, "rows_dropped": self.rows_dropped,
            "verdicts": {k: dict(v) for k, v in self.verdicts.items()},
            "alert_events": [dict(e) for e in self.alert_events],
            "active_alerts": self.active_alerts, "delivery": dict(self.delivery),
        }


def default_owner() -> str:
    return f"{socket.gethostname()}:{os.getpid()}"


def slot_of(as_of: dt.datetime | dt.date | str | None, now: dt.datetime | None = None
            ) -> dt.datetime:
    """The run's instant in UTC: a date means its midnight UTC; None means now (to the second)."""
    if as_of is None:
        moment = now or dt.datetime.now(dt.UTC)
        return moment.astimezone(dt.UTC).replace(microsecond=0)
    if isinstance(as_of, str):
        as_of = dt.datetime.fromisoformat(as_of)
    if isinstance(as_of, dt.datetime):
        moment = as_of if as_of.tzinfo else as_of.replace(tzinfo=dt.UTC)
        return moment.astimezone(dt.UTC)
    return dt.datetime(as_of.year, as_of.month, as_of.day, tzinfo=dt.UTC)


class _Step:
    """Remembers which step of the run is under way, for the failure record."""

    def __init__(self) -> None:
        self.name = "start"
        self.timings: dict[str, float] = {}
        self._started = time.perf_counter()

    def __call__(self, name: str) -> None:
        now = time.perf_counter()
        self.timings[self.name] = round(now - self._started, 4)
        self.name = name
        self._started = now


def run_monitor(
    config: str | Path | Spec,
    name: str,
    as_of: dt.datetime | dt.date | str | None = None,
    *,
    store: HistoryStore | None = None,
    owner: str | None = None,
    now: dt.datetime | None = None,
    functions: Mapping[str, Callable[[dict[str, Any]], Any]] | None = None,
    deliver: bool = True,
    sleep: Callable[[float], None] | None = None,
) -> RunOutcome:
    """Run one monitor for the slot ``as_of`` and record it in the history store.

    Returns a :class:`RunOutcome`; a failure inside the run does not raise but is
    recorded (status ``failed``, its step and reason, and a data-problem alert).
    Only an invalid spec or an unusable store raise
    (:class:`monitor.errors.ConfigurationError`; a store that cannot be opened is
    a configuration problem of ``history.store``), since then nothing can be
    recorded.

    Parameters
    ----------
    functions
        Python functions for ``callable`` notification targets, by target name
        (for ETL jobs; overrides the target's ``function`` key).
    deliver
        Send the monitor's undelivered messages after the run (default).  When
        False they wait in the outbox for ``regwarden deliver`` or the next run.
    sleep
        Pause between tries of one delivery (injected by tests; ``time.sleep``).
    now
        The current instant (injected by tests): ledger times, alert times and
        delivery times.  The run's data window depends on ``as_of`` only.
    """
    spec = config if isinstance(config, Spec) else load_spec(config)
    monitor = spec.monitor(name)
    own_store = store is None
    history = open_store(spec) if store is None else store
    sources: list[Any] = []
    try:
        slot = slot_of(as_of, now)
        claim = history.claim_slot(monitor.name, slot, owner or default_owner(), now=now)
        if claim is None:
            return RunOutcome(monitor.name, slot, "skipped",
                              reason="this slot was recorded before or is being run elsewhere")
        step = _Step()
        started_at = dt.datetime.now(dt.UTC)
        window_start, window_end = monitor.windows.fresh_window(slot)
        record: dict[str, Any] = {"window_start": window_start, "window_end": window_end,
                                  "started_at": started_at,
                                  "detail": {"spec_digest": spec.digest,
                                             "spec_path": str(spec.path) if spec.path else None}}
        label = alerting.run_label(slot, claim.attempt)
        run_at = (now or dt.datetime.now(dt.UTC)).astimezone(dt.UTC)
        previous: alerting.AlertingState | None = None
        try:
            step("alert state")
            previous = alerting.load_state(history, monitor.name, slot, claim.attempt)
            annotations = history.annotations(monitor.name)
            step("source")
            source = open_source(monitor)
            sources.append(source)
            columns = _needed_columns(monitor)
            scan = source.scan(columns, window_start, window_end)
            step("evaluate")
            segments = _segments(scan, monitor)
            rows: dict[str, list[Any]] = {"metrics": [], "coefficients": [], "comparisons": [],
                                          "verdicts": [], "checks": [], "baselines": []}
            verdicts: dict[str, Mapping[str, Any]] = {}
            conditions: list[Condition] = []
            watch: list[alerting.WatchEntry] = []
            notes: dict[str, str] = {}
            chosen_by_segment: dict[str, str] = {}
            rows_read = rows_dropped = 0
            options = alerting.check_options(monitor.checks)
            for segment in segments:
                chunks = _chunk_source(scan, monitor, segment)
                chosen = history.chosen_model(monitor.name, segment) or \
                    history.chosen_model(monitor.name) or monitor.family.chosen
                chosen_by_segment[segment] = chosen
                family = _family_spec(monitor, chosen)
                step(f"baseline{_label(segment)}")
                baseline, new_baseline = _baseline_for(history, monitor, family, chosen,
                                                       segment, source, columns, options)
                step(f"evaluate{_label(segment)}")
                try:
                    night = _evaluate(monitor, family, chunks, scan, baseline, options)
                except ModelFitError as error:
                    if not monitor.segment_column:
                        raise
                    # one short segment must not stop the others: a data problem of its own
                    conditions.append(Condition(
                        "data_too_few_rows", "breached", "data", segment=segment,
                        statistic_name="", subject="usable rows", detail=error.what))
                    continue
                report = night.report
                # only the small parts: the whole report's dict also serialises every fit and
                # every check, which cost a third of a run
                data = {"verdict": report.verdict.to_dict(),
                        "rows": report.rows.to_dict() if report.rows is not None else {},
                        "ranking": [row.to_dict() for row in report.ranking],
                        "nested": [test.to_dict() for test in report.nested]}
                verdicts[segment] = data["verdict"]
                counts = data.get("rows") or {}
                rows_read += int(counts.get("rows_read", 0))
                rows_dropped += int(counts.get("dropped_rows", 0))
                _collect_rows(rows, report, data, monitor, segment)
                _attach_sample(rows["checks"], night, chosen, segment)
                if new_baseline is None and baseline is None:
                    # no baseline yet: tonight's window becomes it (drift is judged from the
                    # next night on)
                    new_baseline = (night.snapshot(window_start=window_start.isoformat(),
                                                   window_end=window_end.isoformat()),
                                    window_start, window_end)
                if new_baseline is not None:
                    snapshot, start, end = new_baseline
                    rows["baselines"].append(BaselineRow(
                        model=chosen, payload=snapshot.to_dict(), format_version=snapshot.version,
                        window_start=start, window_end=end, segment=segment))
                step(f"watch{_label(segment)}")
                current = new_baseline[0] if new_baseline is not None else baseline
                entry, found, note = _watch(
                    previous, monitor, night, chosen, segment, current, source, columns, scan,
                    (window_start, window_end), slot, annotations)
                notes[segment] = note
                if entry is not None:
                    watch.append(entry)
                conditions += found
                conditions += alerting.data_conditions(counts, segment=segment,
                                                       alerts=monitor.alerts)
                conditions += alerting.model_conditions(
                    report, chosen=chosen, segment=segment, checks=monitor.checks,
                    alerts=monitor.alerts,
                    baseline_r_squared=entry.baseline_r_squared if entry else None,
                    baseline_rows=baseline.n if baseline is not None else None)
            if not verdicts:
                raise ModelFitError("no segment of the window has enough usable rows",
                                    where=f"monitor {monitor.name!r}, window "
                                    f"{window_start.isoformat()}..{window_end.isoformat()}",
                                    hint="check the source and the window")
            step("rules")
            watermark = scan.max_time
            conditions += alerting.freshness_conditions(
                watermark=watermark, previous=previous.watermark, slot_at=slot,
                alerts=monitor.alerts, segmented=bool(monitor.segment_column))
            people, retired = alerting.retire(
                alerting.merge_people(previous.records, history.alerts(monitor.name),
                                      monitor.name), chosen_by_segment, label=label,
                run_at=run_at)
            outcome, held = alerting.decide(
                people, conditions, monitor=monitor.name, label=label, run_at=run_at,
                policy=alerting.policy_of(monitor.alerts),
                silenced=alerting.silenced_segments(annotations, slot))
            newest = max((m for m in (watermark, previous.watermark) if m is not None),
                         default=None)
            state = alerting.AlertingState(outcome.records, tuple(watch), newest)
            record["detail"] = dict(record["detail"], alerting=state.to_dict(),
                                    watch_notes=notes,
                                    silenced_conditions=[c.to_dict() for c in held],
                                    suppressed_conditions=len(outcome.suppressed))
            step("history")
            record.update(rows_read=scan.rows or rows_read, rows_dropped=rows_dropped,
                          watermark_at=watermark, finished_at=dt.datetime.now(dt.UTC),
                          timings=step.timings)
            run_id = history.complete_run(
                claim, RunRecord(**record), now=now,
                alerts=[*map(alerting.record_row, retired),
                        *alerting.alert_rows(outcome, conditions)],
                deliveries=alerting.delivery_rows(outcome.events, monitor, label=label,
                                                  created_at=run_at), **rows)
            delivery = _deliver(history, monitor, deliver, functions, sleep, now)
            return RunOutcome(monitor.name, slot, "completed", run_id, None, None, window_start,
                              window_end, int(scan.rows or rows_read), rows_dropped, verdicts,
                              alert_events=alerting.event_summary(outcome.events),
                              active_alerts=len(outcome.active), delivery=delivery)
        except RegwardenError as error:
            return _record_failure(history, claim, monitor, slot, step, record, error,
                                   error.kind, error.exit_code, now, previous, label, run_at,
                                   deliver, functions, sleep)
        except Exception as error:  # noqa: BLE001 - a bug must still leave a failed run behind
            logger.exception("monitor %r failed in step %s", monitor.name, step.name)
            return _record_failure(history, claim, monitor, slot, step, record, error,
                                   "internal", 4, now, previous, label, run_at, deliver,
                                   functions, sleep)
    finally:
        for source in sources:
            close = getattr(source, "close", None)
            if close is not None:
                close()
        if own_store:
            history.close()


def _deliver(history: HistoryStore, monitor: MonitorSpec, deliver: bool,
             functions: Mapping[str, Callable[[dict[str, Any]], Any]] | None,
             sleep: Callable[[float], None] | None,
             now: dt.datetime | None) -> dict[str, Any]:
    """Send the monitor's undelivered messages; a delivery problem never fails the run."""
    if not deliver or not monitor.notify:
        return {}
    try:
        report = alerting.deliver_monitor(history, monitor, now=now or dt.datetime.now(dt.UTC),
                                          functions=functions, sleep=sleep)
    except RegwardenError as error:  # e.g. the store went away after the run was recorded
        logger.warning("monitor %r: delivery pass failed: %s", monitor.name, error)
        return {"delivered": 0, "failed": 0, "error": str(error)}
    if report.failed:
        logger.warning("monitor %r: %d message(s) not delivered (kept for the next try)",
                       monitor.name, len(report.failed))
    return {"delivered": len(report.delivered), "failed": len(report.failed),
            "errors": [error for _, error in report.failed],
            "unknown_target": len(report.unknown_target)}


def _watch(previous: alerting.AlertingState, monitor: MonitorSpec, night: Any, chosen: str,
           segment: str, baseline: Any, source: Any, columns: list[str], scan: Any,
           window: tuple[dt.datetime, dt.datetime], slot: dt.datetime,
           annotations: Any) -> tuple[alerting.WatchEntry | None, list[Condition], str]:
    """Advance the segment's sequential watch (see :func:`alerting.advance_watch`).

    The reference is built from the baseline window's rows when the watch starts
    (tonight's window when the baseline is made tonight); the rows scored are
    those after the previous run's watermark (on a start night: after the
    baseline window as well), within tonight's window.
    """
    if baseline is None:
        return None, [], "no baseline"
    design = night.pass_two.design
    report = night.report
    layout = alerting.watch_layout(design, report.family.names, chosen, report.nesting)
    skip = alerting.silenced_ranges(annotations, segment)
    window_start, window_end = window
    base_start, base_end = _instant_or(baseline.window_start, window_start), \
        _instant_or(baseline.window_end, window_end)
    time_column, segment_column = monitor.source.time_column, monitor.segment_column

    def reference_rows() -> tuple[np.ndarray, np.ndarray, float]:
        rows = scan if (base_start, base_end) == (window_start, window_end) else \
            source.scan(columns, base_start, base_end)
        X, y, _ = alerting.gather_rows(rows, design, time_column=time_column,
                                       segment_column=segment_column, segment=segment,
                                       skip=skip)
        days = max((base_end - base_start).total_seconds() / 86400.0, 1e-9)
        return layout.local(X), y, max(X.shape[0] / days * _run_spacing_days(monitor, slot),
                                       1e-3)

    def new_rows(started: bool) -> tuple[np.ndarray, np.ndarray]:
        after = previous.watermark
        not_before = max(window_start, base_end) if started else window_start
        if after is None and not started:
            return layout.local(np.zeros((0, len(design.columns)))), np.zeros(0)
        if not_before >= window_end:
            return layout.local(np.zeros((0, len(design.columns)))), np.zeros(0)
        start = not_before if after is None else max(not_before, after)
        rows = source.scan(columns, start, window_end)
        X, y, _ = alerting.gather_rows(rows, design, time_column=time_column,
                                       segment_column=segment_column, segment=segment,
                                       after=after, not_before=not_before, skip=skip)
        return layout.local(X), y

    return alerting.advance_watch(
        previous.watch_of(segment), identity=alerting.baseline_identity(baseline, chosen),
        layout=layout, reference_rows=reference_rows, new_rows=new_rows,
        settings=monitor.alerts, model=chosen, segment=segment)


def _instant_or(text: Any, default: dt.datetime) -> dt.datetime:
    if not text:
        return default
    try:
        moment = dt.datetime.fromisoformat(str(text))
    except ValueError:
        return default
    return moment if moment.tzinfo else moment.replace(tzinfo=dt.UTC)


def _run_spacing_days(monitor: MonitorSpec, slot: dt.datetime) -> float:
    """Days between this slot and the next one of the schedule (1 without a schedule)."""
    if monitor.schedule is None:
        return 1.0
    from .schedule import next_slot

    following = next_slot(monitor, slot)
    if following is None:
        return 1.0
    return max((following - slot).total_seconds() / 86400.0, 1e-6)


def _record_failure(history: HistoryStore, claim: Any, monitor: MonitorSpec, slot: dt.datetime,
                    step: _Step, record: dict[str, Any], error: BaseException, kind: str,
                    exit_code: int, now: dt.datetime | None,
                    previous: alerting.AlertingState | None, label: str, run_at: dt.datetime,
                    deliver: bool, functions: Any, sleep: Any) -> RunOutcome:
    reason = str(error) if isinstance(error, RegwardenError) else \
        f"{type(error).__name__}: {error} (a bug; see the log)"
    failed_step = step.name
    record.update(finished_at=dt.datetime.now(dt.UTC), timings=step.timings)
    alert_rows: list[AlertRow] = []
    delivery_rows: list[DeliveryRow] = []
    events: tuple[Mapping[str, Any], ...] = ()
    active = 0
    try:
        # the failure becomes a data-problem alert, through the same rules as any finding
        state = previous or alerting.load_state(history, monitor.name, slot, claim.attempt)
        conditions = alerting.failure_conditions(error, failed_step)
        people = alerting.merge_people(state.records, history.alerts(monitor.name),
                                       monitor.name)
        outcome, held = alerting.decide(
            people, conditions, monitor=monitor.name, label=label, run_at=run_at,
            policy=alerting.policy_of(monitor.alerts),
            silenced=alerting.silenced_segments(history.annotations(monitor.name), slot))
        kept = alerting.AlertingState(outcome.records, state.watch, state.watermark)
        record["detail"] = dict(record.get("detail") or {}, alerting=kept.to_dict(),
                                silenced_conditions=[c.to_dict() for c in held])
        alert_rows = alerting.alert_rows(outcome, conditions)
        delivery_rows = alerting.delivery_rows(outcome.events, monitor, label=label,
                                               created_at=run_at)
        events = alerting.event_summary(outcome.events)
        active = len(outcome.active)
    except Exception as problem:  # noqa: BLE001 - the failure itself must be recorded
        logger.exception("monitor %r: the failure alert could not be prepared: %s",
                         monitor.name, problem)
    run_id = history.fail_run(claim, failed_step, reason, run=RunRecord(**record),
                              error_kind=kind, alerts=alert_rows, deliveries=delivery_rows,
                              now=now)
    logger.warning("monitor %r slot %s failed in step %s: %s", monitor.name, slot.isoformat(),
                   failed_step, reason)
    delivery = _deliver(history, monitor, deliver, functions, sleep, now)
    return RunOutcome(monitor.name, slot, "failed", run_id, failed_step, reason,
                      record.get("window_start"), record.get("window_end"),
                      exit_code=exit_code, alert_events=events, active_alerts=active,
                      delivery=delivery)


def _needed_columns(monitor: MonitorSpec) -> list[str]:
    from ..stats.formula import parse_formula

    columns: list[str] = [monitor.source.time_column]
    for formula in monitor.family.candidates.values():
        for column in parse_formula(formula).columns:
            if column not in columns:
                columns.append(column)
    for extra in (monitor.source.key_column, monitor.segment_column):
        if extra and extra not in columns:
            columns.append(extra)
    return columns


def _segments(scan: Any, monitor: MonitorSpec) -> list[str]:
    """Segment values present in the window ("" when the monitor has no segment column)."""
    if not monitor.segment_column:
        return [""]
    values: set[str] = set()
    for batch in scan:
        column = batch.column(batch.schema.get_field_index(monitor.segment_column))
        values.update(str(v) for v in pc.unique(column).to_pylist() if v is not None)
    return sorted(values)


def _chunk_source(scan: Any, monitor: MonitorSpec, segment: str
                  ) -> Callable[[], Iterator[Mapping[str, np.ndarray]]]:
    column = monitor.segment_column

    def chunks() -> Iterator[Mapping[str, np.ndarray]]:
        for batch in scan:
            if column:
                mask = pc.equal(pc.cast(batch.column(batch.schema.get_field_index(column)),
                                        pa.string()), segment)
                batch = batch.filter(mask)
                if batch.num_rows == 0:
                    continue
            yield arrow_to_columns(batch)
    return chunks


def _label(segment: str) -> str:
    return f" of segment {segment!r}" if segment else ""


def _family_spec(monitor: MonitorSpec, chosen: str) -> Any:
    from ..stats.family import make_family_spec

    family = monitor.family
    return make_family_spec(response=family.response, candidates=dict(family.candidates),
                            chosen=chosen, criterion=family.criterion, alpha=family.alpha,
                            margin=family.margin, where=f"monitors.{monitor.name}.family")


def _evaluate(monitor: MonitorSpec, family: Any,
              chunks: Callable[[], Iterator[Mapping[str, np.ndarray]]], scan: Any,
              baseline: Any, options: Any = None) -> Any:
    from ..stats.nightly import evaluate_night

    return evaluate_night(family, chunks, baseline=baseline,
                          time_column=monitor.source.time_column,
                          key_column=monitor.source.key_column or monitor.source.time_column,
                          in_time_order=lambda: bool(scan.in_time_order), options=options)


def _baseline_for(history: HistoryStore, monitor: MonitorSpec, family: Any, chosen: str,
                  segment: str, source: Any, columns: list[str],
                  options: Any = None) -> tuple[Any, Any]:
    """(baseline to compare with tonight, new baseline row to store or None).

    The newest stored baseline of the chosen model is used unless a promotion came
    after it or the candidates changed.  Without one: a fixed baseline window in
    the spec is summarised now (two reads of that window); otherwise the caller
    turns tonight's window into the baseline.
    """
    from ..stats.drift import BaselineSnapshot
    from ..stats.nightly import baseline_fits_family

    stored = history.latest_baseline(monitor.name, chosen, segment)
    if stored is not None:
        promotions = history.promotions(monitor.name)
        promoted_after = (not promotions.empty and
                          bool((promotions["promoted_at"] > stored.created_at).any()))
        snapshot = BaselineSnapshot.from_dict(stored.payload)
        if not promoted_after and baseline_fits_family(snapshot, family):
            return snapshot, None
    windows = monitor.windows
    if windows.baseline_start is None or windows.baseline_end is None:
        return None, None
    scan = source.scan(columns, windows.baseline_start, windows.baseline_end)
    night = _evaluate(monitor, family, _chunk_source(scan, monitor, segment), scan, None,
                      options)
    snapshot = night.snapshot(window_start=windows.baseline_start.isoformat(),
                              window_end=windows.baseline_end.isoformat())
    return snapshot, (snapshot, windows.baseline_start, windows.baseline_end)


def _number(value: Any) -> float | None:
    if value is None:
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def _attach_sample(checks: list[Any], night: Any, chosen: str, segment: str) -> None:
    """Keep a bounded, time-ordered sample of the chosen model's rows with its ``cusum`` row.

    The report draws tonight's errors over time and against the predictions from it
    (:func:`monitor.stats.nightly.NightlyEvaluation.sample_view`).
    """
    view = night.sample_view(chosen)
    if not view:
        return
    for index, row in enumerate(checks):
        if row.model == chosen and row.segment == segment and row.check == "cusum":
            checks[index] = dataclasses.replace(row, detail={**(row.detail or {}), **view})
            return


def _collect_rows(rows: dict[str, list[Any]], report: Any, data: Mapping[str, Any],
                  monitor: MonitorSpec, segment: str) -> None:
    fits = getattr(report, "fits", {})
    ranking = {row["name"]: row for row in data["ranking"]}
    for name, fit in fits.items():
        for metric in FIT_METRICS:
            rows["metrics"].append(MetricRow(model=name, metric=metric,
                                             value=_number(getattr(fit, metric)), segment=segment))
        for metric in RANKING_METRICS:
            rows["metrics"].append(MetricRow(model=name, metric=metric,
                                             value=_number(ranking.get(name, {}).get(metric)),
                                             segment=segment))
        for coefficient in fit.coefficients:
            rows["coefficients"].append(CoefficientRow(
                model=name, term=coefficient.term, estimate=_number(coefficient.estimate),
                std_error=_number(coefficient.std_error), ci_lower=_number(coefficient.ci_lower),
                ci_upper=_number(coefficient.ci_upper), ci_level=fit.confidence_level,
                p_value=_number(coefficient.p_value), segment=segment))
    for test in data.get("nested", []):
        for kind, statistic, p_value in (("partial_f", "f_statistic", "f_pvalue"),
                                         ("likelihood_ratio", "lr_statistic", "lr_pvalue")):
            rows["comparisons"].append(ComparisonRow(
                model=test["smaller"], other_model=test["larger"], test=kind,
                statistic=_number(test.get(statistic)), p_value=_number(test.get(p_value)),
                df=_number(test.get("df")), segment=segment))
    for name, results in getattr(report, "checks", {}).items():
        for result in results:
            df, df2 = _degrees(result.df)
            detail = dict(result.detail)
            detail.update(reference=result.reference, thresholds=dict(result.thresholds))
            if not result.applicable:
                detail["reason"] = result.reason
            rows["checks"].append(CheckRow(
                model=name, check=result.check, verdict=result.verdict,
                statistic=_number(result.statistic), p_value=_number(result.p_value),
                df=df, df2=df2, is_exact=result.exact, sample_size=result.sample_size,
                rows=result.rows, detail=detail, segment=segment))
    verdict = data["verdict"]
    rows["verdicts"].append(VerdictRow(
        criterion=monitor.family.criterion, best_model=verdict.get("best"),
        chosen_model=verdict.get("chosen"), is_chosen_best=verdict.get("chosen_is_best"),
        margin=monitor.family.margin, detail=verdict, segment=segment))


def _degrees(df: Any) -> tuple[float | None, float | None]:
    if df is None:
        return None, None
    if isinstance(df, (tuple, list)):
        return _number(df[0]), _number(df[1]) if len(df) > 1 else None
    return _number(df), None


def run_as_user() -> str:
    """The OS user, for promotions and acknowledgements."""
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"
