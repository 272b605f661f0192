"""The alerting part of one run: findings → conditions → rules → alert rows, messages, delivery.

:func:`monitor.runs.run.run_monitor` calls these pieces after the evaluation of
every segment.  Nothing here decides statistics: the checks, the family verdict
and the sequential charts (:mod:`monitor.runs.policy`) have done that; this
module turns their results into :class:`~monitor.runs.rules.Condition` objects,
applies :func:`~monitor.runs.rules.apply_rules` with the previous records, and
prepares what the history store writes in the run's one transaction.

Where the rule state lives
--------------------------
The rules need, for every tracked alert key, more than the ``alerts`` table
holds (the verdicts of the last runs, the clean streak, the episode; keys that
were breached once but never opened), and the sequential watch needs its
:class:`~monitor.runs.policy.WatchState` per segment and model.  Both are kept
in the ``detail`` JSON of every finished run, under ``"alerting"``
(:class:`AlertingState`, versioned).  The next run reads the run just before
its slot (:meth:`storage.history.HistoryStore.run_before`).  Why there and not
in a table of its own: it is written in the same transaction as the run it
describes (so a crash never leaves state and results apart), it needs no schema
migration, and the history keeps, run by run, the exact chart values that led to
an alert.  A failed run copies the state forward (with its own failure alert),
so a failure never loses it.

What people do to alerts (acknowledge, snooze, resolve by hand) is written to the
``alerts`` table by the command line; :func:`merge_people` folds it into the
records before the rules run, so the table stays the authority for that.

Which findings become conditions
--------------------------------
* the family verdict of the chosen model: outranked outside the margin
  (breached; within the margin: watch), and not significant by its overall
  F-test (breached);
* the chosen model's checks, grouped by what they test (:data:`CHECK_KINDS`):
  a check's own ``fail`` is breached, ``warn`` is watch, ``pass`` clean; those
  with a p-value enter Benjamini–Hochberg across the run (the extrapolation
  share gets one from :func:`extrapolation_p_value`); checks listed in
  ``[checks] quiet`` are left out;
* the R² of the chosen model against the baseline's (``max_r_squared_drop``);
* the sequential watch on the rows that are new since the last run;
* data problems per segment (too few usable rows, too many dropped rows,
  unseen category values) and for the monitor (no new rows since the last run;
  the source unreachable, its schema changed, or the run failed — from a failed
  run, cleared by the next completed one).

An annotation with ``silences_alerts`` covering the run's slot silences the
run's findings for its segment (or every segment): they count neither as
breached nor as clean.  Rows whose time lies in such an annotation are not fed to
the sequential watch.

An alert is statistical evidence, not proof: people who know the data decide.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import logging
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from storage.history import AlertRow, DeliveryRow, HistoryStore

from .._frames import arrow_to_columns
from ..errors import (
    ConfigurationError,
    DataValidationError,
    ModelFitError,
    RegwardenError,
    SourceError,
)
from .delivery import (
    CallableTarget,
    DeliveryReport,
    EmailTarget,
    JsonLinesTarget,
    LogTarget,
    Message,
    PendingDelivery,
    RetryPolicy,
    SendError,
    Target,
    WebhookTarget,
    build_messages,
    deliver_pending,
)
from .policy import AlertPolicy, WatchState, watch_night
from .rules import (
    ALERT_KINDS,
    AlertEvent,
    AlertKey,
    AlertRecord,
    Condition,
    Persistence,
    RuleOutcome,
    apply_rules,
)
from .spec import AlertSettings, ChecksSettings, MonitorSpec, NotifySpec

__all__ = [
    "CHECK_KINDS",
    "AlertingState",
    "StoreOutbox",
    "WatchEntry",
    "alert_rows",
    "build_targets",
    "record_row",
    "retire",
    "check_options",
    "data_conditions",
    "deliver_monitor",
    "failure_conditions",
    "load_state",
    "merge_people",
    "model_conditions",
    "policy_of",
    "run_label",
    "silenced_segments",
]

logger = logging.getLogger(__name__)

#: version of the "alerting" entry of a run's detail
STATE_VERSION = 1

#: alert kind of each check id (the checks' own groups, see monitor.stats.checks.CHECKS)
CHECK_KINDS: Mapping[str, str] = {
    "jarque_bera": "assumption_normality", "dagostino_pearson": "assumption_normality",
    "shapiro_wilk": "assumption_normality", "anderson_darling": "assumption_normality",
    "breusch_pagan": "assumption_constant_variance",
    "breusch_pagan_studentized": "assumption_constant_variance",
    "white": "assumption_constant_variance",
    "durbin_watson": "assumption_independence", "breusch_godfrey": "assumption_independence",
    "ljung_box": "assumption_independence",
    "reset": "assumption_functional_form",
    "vif": "assumption_collinearity", "condition_index": "assumption_collinearity",
    "outlier_bonferroni": "assumption_influence", "cooks_distance": "assumption_influence",
    "cusum": "coefficients_unstable", "chow": "coefficients_unstable",
    "coefficient_wald": "coefficients_unstable",
    "ks_residuals": "residual_drift", "anderson_darling_ksample": "residual_drift",
    "psi": "residual_drift", "mean_shift": "residual_drift", "variance_ratio": "residual_drift",
    "forecast_error_ratio": "fit_degraded", "interval_coverage": "fit_degraded",
    "input_drift": "input_drift", "extrapolation": "extrapolation",
}
_CHECK_VERDICTS = {"fail": "breached", "warn": "watch", "pass": "clean"}
#: kinds a failed run can raise, all cleared by the next completed run
_FAILURE_KINDS = ("data_source_unreachable", "data_schema_changed", "data_too_few_rows",
                  "run_failed")


# ----------------------------------------------------------------------------- settings


def policy_of(settings: AlertSettings, rows_per_night: float = 1.0) -> AlertPolicy:
    """The :class:`AlertPolicy` the spec's ``[alerts]`` keys describe."""
    return AlertPolicy(
        nights_between_false_alarms=settings.nights_between_false_alarms,
        rows_per_night=rows_per_night,
        watch_coefficients=settings.watch_coefficients,
        false_discovery_rate=settings.false_discovery_rate,
        window_persistence=Persistence(settings.open_after_runs, settings.out_of_last_runs,
                                       settings.clear_after_clean_runs),
        sequential_persistence=Persistence(1, 1, settings.watch_clear_after_clean_runs),
        window_severity_cap=settings.highest_window_severity)


def check_options(settings: ChecksSettings) -> Any:
    """The ``CheckOptions`` of pass 2 that the spec's ``[checks]`` keys describe."""
    from ..stats.residual_pass import CheckOptions

    return CheckOptions(sample_size=settings.sample_size, seed=settings.seed,
                        lags=settings.lags, white_max_columns=settings.white_max_columns,
                        fail_level=settings.fail_level, warn_level=settings.warn_level)


def run_label(slot_at: dt.datetime, attempt: int) -> str:
    """How alerts and messages name a run: its slot (UTC, minutes), ``.2`` for a second attempt."""
    label = slot_at.astimezone(dt.UTC).strftime("%Y-%m-%dT%H:%MZ")
    return label if attempt <= 1 else f"{label}.{attempt}"


# ----------------------------------------------------------------------------- state


@dataclass(frozen=True, slots=True)
class WatchEntry:
    """The sequential watch of one segment's chosen model, with what it was built for.

    ``baseline`` identifies the baseline the reference was built from; a new
    baseline (a promotion, a changed family) or another chosen model rebuilds the
    watch.  ``columns`` are the labels of the reference's columns (``chosen``,
    ``watched`` and ``larger`` index into them).  ``rows_per_night`` is fixed
    when the watch starts, so the charts' thresholds stay put.
    """

    segment: str
    model: str
    baseline: str
    columns: tuple[str, ...]
    chosen: tuple[int, ...]
    watched: tuple[int, ...]
    larger: tuple[tuple[int, ...], ...]
    rows_per_night: float
    baseline_r_squared: float | None
    state: WatchState

    def to_dict(self) -> dict[str, Any]:
        return {"segment": self.segment, "model": self.model, "baseline": self.baseline,
                "columns": list(self.columns), "chosen": list(self.chosen),
                "watched": list(self.watched), "larger": [list(c) for c in self.larger],
                "rows_per_night": self.rows_per_night,
                "baseline_r_squared": self.baseline_r_squared, "state": self.state.to_dict()}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> WatchEntry:
        r2 = data.get("baseline_r_squared")
        return cls(str(data["segment"]), str(data["model"]), str(data["baseline"]),
                   tuple(str(c) for c in data["columns"]), tuple(int(c) for c in data["chosen"]),
                   tuple(int(c) for c in data["watched"]),
                   tuple(tuple(int(c) for c in cand) for cand in data["larger"]),
                   float(data["rows_per_night"]), None if r2 is None else float(r2),
                   WatchState.from_dict(data["state"]))


@dataclass(frozen=True, slots=True)
class AlertingState:
    """What the alerting of a monitor carries from run to run (kept in each run's detail).

    ``records``: every tracked alert key (quiet ones too); ``watch``: one entry
    per segment; ``watermark``: the newest row time any completed run has seen.
    """

    records: tuple[AlertRecord, ...] = ()
    watch: tuple[WatchEntry, ...] = ()
    watermark: dt.datetime | None = None

    def watch_of(self, segment: str) -> WatchEntry | None:
        return next((entry for entry in self.watch if entry.segment == segment), None)

    def to_dict(self) -> dict[str, Any]:
        return {"version": STATE_VERSION, "records": [r.to_dict() for r in self.records],
                "watch": [entry.to_dict() for entry in self.watch],
                "watermark": None if self.watermark is None else self.watermark.isoformat()}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> AlertingState:
        version = int(data.get("version", 1))
        if version > STATE_VERSION:
            raise ConfigurationError(
                f"the alerting state of the previous run has version {version}, newer than "
                f"this regwarden understands ({STATE_VERSION})", where="runs.detail.alerting",
                hint="upgrade regwarden on this machine")
        watermark = data.get("watermark")
        return cls(tuple(AlertRecord.from_dict(r) for r in data.get("records", ())),
                   tuple(WatchEntry.from_dict(w) for w in data.get("watch", ())),
                   None if watermark is None else dt.datetime.fromisoformat(watermark))


def load_state(store: HistoryStore, monitor: str, slot_at: dt.datetime,
               attempt: int) -> AlertingState:
    """The state left by the run just before this slot (empty before the first)."""
    previous = store.run_before(monitor, slot_at, attempt)
    detail = (previous or {}).get("detail") or {}
    data = detail.get("alerting") if isinstance(detail, Mapping) else None
    if not data:
        # a run recorded before alerting existed: start from its watermark
        watermark = (previous or {}).get("watermark_at") \
            if previous and previous.get("status") == "completed" else None
        return AlertingState(watermark=watermark)
    return AlertingState.from_dict(data)


def _moment(value: Any) -> dt.datetime | None:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return None
    try:
        import pandas as pd

        if value is pd.NaT:
            return None
        if isinstance(value, pd.Timestamp):
            return value.to_pydatetime()
    except ImportError:  # pragma: no cover - pandas is a dependency
        pass
    return value if isinstance(value, dt.datetime) else None


def merge_people(records: Iterable[AlertRecord], table: Any, monitor: str) -> list[AlertRecord]:
    """Fold what people did in the ``alerts`` table (ack, snooze, resolve, reopen) into records.

    Active alerts of the table without a record (e.g. written by an older
    version) get one, so the rules can clear them.  Missed-run alerts belong to
    the scheduler's watchdog and are left alone.
    """
    rows: dict[AlertKey, Mapping[str, Any]] = {}
    if table is not None and len(table):
        for row in table.to_dict("records"):
            if row["kind"] in ALERT_KINDS and ALERT_KINDS[row["kind"]].group != "schedule":
                rows[AlertKey(monitor, row["segment"], row["model"], row["kind"])] = row
    merged: dict[AlertKey, AlertRecord] = {}
    for record in records:
        row = rows.get(record.key)
        if row is not None and record.is_active:
            state = row["state"]
            if state == "acknowledged" and record.state != "acknowledged":
                record = replace(record, state="acknowledged", snoozed_until=None,
                                 acknowledged_by=str(row.get("state_changed_by") or ""))
            elif state == "snoozed":
                record = replace(record, state="snoozed",
                                 snoozed_until=_moment(row.get("snooze_until")))
            elif state == "resolved":
                record = replace(record, state="resolved", resolved_run="by hand",
                                 resolved_at=_moment(row.get("resolved_at")), snoozed_until=None)
            elif state == "open" and record.state != "open":
                record = replace(record, state="open", acknowledged_by="", snoozed_until=None)
        merged[record.key] = record
    for key, row in rows.items():
        if key not in merged and row["state"] in ("open", "acknowledged", "snoozed"):
            merged[key] = AlertRecord(
                key, state=row["state"], severity=row["severity"], episode=1,
                opened_at=_moment(row.get("opened_at")),
                snoozed_until=_moment(row.get("snooze_until")),
                acknowledged_by=str(row.get("state_changed_by") or "")
                if row["state"] == "acknowledged" else "", message=str(row["message"]))
    return sorted(merged.values(), key=lambda r: r.key)


def silenced_segments(annotations: Any, slot_at: dt.datetime) -> set[str | None]:
    """Segments (None = all) that an annotation with ``silences_alerts`` covers at the slot."""
    silenced: set[str | None] = set()
    if annotations is None or not len(annotations):
        return silenced
    for row in annotations.to_dict("records"):
        start, end = _moment(row["starts_at"]), _moment(row["ends_at"])
        if row["silences_alerts"] and start is not None and end is not None \
                and start <= slot_at < end:
            segment = row.get("segment")
            silenced.add(None if segment is None or (isinstance(segment, float)) else
                         str(segment))
    return silenced


def silenced_ranges(annotations: Any, segment: str) -> list[tuple[dt.datetime, dt.datetime]]:
    """Time ranges whose rows the sequential watch leaves out for a segment."""
    ranges = []
    if annotations is None or not len(annotations):
        return ranges
    for row in annotations.to_dict("records"):
        other = row.get("segment")
        applies = other is None or isinstance(other, float) or str(other) == segment
        start, end = _moment(row["starts_at"]), _moment(row["ends_at"])
        if row["silences_alerts"] and applies and start is not None and end is not None:
            ranges.append((start, end))
    return ranges


# ----------------------------------------------------------------------------- conditions


def _finite(value: Any) -> float | None:
    if value is None:
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def extrapolation_p_value(flagged: int, rows: int, baseline_rows: int,
                          regressors: int) -> float | None:
    """p-value of ``flagged`` of ``rows`` fresh rows being flagged as extrapolation.

    Notes
    -----
    A regwarden approximation, no published source.  Under an unchanged process
    with exchangeable rows, a fresh row exceeds the maximum (or falls below the
    minimum) of ``n`` baseline values of one regressor with probability
    ``1/(n + 1)``, and its leverage exceeds the baseline's largest with about the
    same probability; the union of the ``2q + 1`` events has probability at most
    ``p0 = (2q + 1)/(n + 1)`` (Bonferroni).  The p-value is the binomial upper tail
    ``P(X ≥ flagged)``, ``X ~ Bin(rows, p0)``.  The check's own thresholds (1 % /
    5 %) are below ``p0`` for baselines of fewer than about 100 rows, where a
    stable process would trip them every other night; this p-value lets the
    false-discovery control judge the count instead.
    """
    if rows <= 0 or baseline_rows <= 0:
        return None
    from scipy import stats

    p0 = min(1.0, (2 * regressors + 1) / (baseline_rows + 1))
    return float(stats.binom.sf(flagged - 1, rows, p0))


def model_conditions(report: Any, *, chosen: str, segment: str, checks: ChecksSettings,
                     alerts: AlertSettings, baseline_r_squared: float | None,
                     baseline_rows: int | None = None) -> list[Condition]:
    """Conditions from the family verdict, the chosen model's checks and its R²."""
    verdict = report.verdict
    conditions: list[Condition] = []
    if verdict.chosen_is_best:
        state = "clean"
    else:
        state = "watch" if verdict.chosen_within_margin else "breached"
    nested_p = verdict.nested_f_pvalue if verdict.nested_direction == "best_nests_chosen" \
        else None
    conditions.append(Condition(
        "chosen_outranked", state, "window", model=chosen, segment=segment,
        statistic_name=f"Δ{verdict.criterion.upper()}", statistic=_finite(verdict.delta),
        threshold=verdict.margin, p_value=_finite(nested_p), subject=f"best {verdict.best!r}",
        detail="" if verdict.chosen_is_best else f"{verdict.best!r} ranks first"))
    if verdict.chosen_is_useful is not None:
        conditions.append(Condition(
            "chosen_not_significant", "clean" if verdict.chosen_is_useful else "breached",
            "window", model=chosen, segment=segment, statistic_name="overall F-test p-value",
            statistic=_finite(verdict.chosen_f_pvalue), threshold=verdict.alpha,
            subject="overall F-test"))
    for result in report.checks.get(chosen, ()):
        kind = CHECK_KINDS.get(result.check)
        if kind is None or result.check in checks.quiet or not result.applicable \
                or result.verdict not in _CHECK_VERDICTS:
            continue
        p_value = _finite(result.p_value)
        if result.check == "extrapolation" and baseline_rows and p_value is None:
            fit = report.fits.get(chosen)
            regressors = int(fit.rank) - int(bool(fit.has_intercept)) if fit else 1
            p_value = extrapolation_p_value(int(result.detail.get("rows_flagged", 0)),
                                            int(result.rows), int(baseline_rows),
                                            max(regressors, 1))
        threshold = None if p_value is not None else _finite(result.thresholds.get("fail"))
        conditions.append(Condition(
            kind, _CHECK_VERDICTS[result.verdict], "window", model=chosen, segment=segment,
            statistic_name="statistic", statistic=_finite(result.statistic),
            threshold=threshold, p_value=p_value, subject=result.check))
    fit = report.fits.get(chosen)
    r_squared = _finite(getattr(fit, "r_squared", None))
    if baseline_r_squared is not None and r_squared is not None:
        drop = baseline_r_squared - r_squared
        limit = alerts.max_r_squared_drop
        state = "breached" if drop > limit else "watch" if drop > limit / 2 else "clean"
        conditions.append(Condition(
            "fit_degraded", state, "window", model=chosen, segment=segment,
            statistic_name="drop of R² below the baseline", statistic=drop, threshold=limit,
            subject="R²", detail=f"R² {r_squared:.3f} against {baseline_r_squared:.3f} at the "
            "baseline"))
    return conditions


def data_conditions(rows: Mapping[str, Any], *, segment: str,
                    alerts: AlertSettings) -> list[Condition]:
    """Too few usable rows, too many dropped rows, unseen category values (one segment)."""
    read = int(rows.get("rows_read", 0) or 0)
    used = int(rows.get("rows_used", 0) or 0)
    dropped = int(rows.get("dropped_rows", 0) or 0)
    unseen = rows.get("unseen_levels") or {}
    unseen_rows = sum(int(c) for levels in unseen.values() for c in levels.values())
    share = dropped / read if read else 0.0
    first_unseen = ", ".join(f"{column}: {', '.join(sorted(levels)[:3])}"
                             for column, levels in sorted(unseen.items()))
    return [
        Condition("data_too_few_rows", "breached" if used < alerts.min_rows else "clean", "data",
                  segment=segment, statistic_name="usable rows", statistic=float(used),
                  threshold=float(alerts.min_rows), subject="usable rows"),
        Condition("data_too_many_dropped_rows",
                  "breached" if share > alerts.max_dropped_share else "clean", "data",
                  segment=segment, statistic_name="share of rows left out", statistic=share,
                  threshold=alerts.max_dropped_share, subject="rows left out",
                  detail=f"{dropped} of {read} rows" if dropped else ""),
        Condition("data_unseen_levels",
                  "breached" if unseen_rows > alerts.max_unseen_level_rows else "clean", "data",
                  segment=segment, statistic_name="rows with unseen values",
                  statistic=float(unseen_rows), threshold=float(alerts.max_unseen_level_rows),
                  subject="category values", detail=first_unseen),
    ]


def freshness_conditions(*, watermark: dt.datetime | None, previous: dt.datetime | None,
                         slot_at: dt.datetime, alerts: AlertSettings,
                         segmented: bool) -> list[Condition]:
    """Monitor-wide: no new rows since the last run; and the clean side of the failure kinds."""
    conditions = [Condition(kind, "clean", "data") for kind in _FAILURE_KINDS
                  if kind != "data_too_few_rows" or segmented]
    if previous is not None:
        newest = watermark if watermark is not None and watermark > previous else None
        age_days = (slot_at - (watermark or previous)).total_seconds() / 86400.0
        stale = newest is None and age_days > alerts.max_days_without_new_rows
        conditions.append(Condition(
            "data_no_new_rows", "breached" if stale else "clean", "data",
            statistic_name="days since the newest row", statistic=age_days,
            threshold=alerts.max_days_without_new_rows, subject="newest row",
            detail=f"newest row {(watermark or previous).isoformat()}" if stale else ""))
    return conditions


def failure_conditions(error: BaseException, step: str) -> list[Condition]:
    """The data-problem condition a failed run raises (its step and reason in the detail)."""
    if isinstance(error, SourceError):
        kind = "data_source_unreachable"
    elif isinstance(error, ModelFitError) or (
            isinstance(error, DataValidationError) and "no rows" in error.what):
        kind = "data_too_few_rows"
    elif isinstance(error, DataValidationError) and "column" in error.context:
        kind = "data_schema_changed"
    else:
        kind = "run_failed"
    what = error.what if isinstance(error, RegwardenError) else f"{type(error).__name__}: {error}"
    what = " ".join(str(what).split())
    if len(what) > 200:
        what = what[:197] + "..."
    return [Condition(kind, "breached", "data", statistic_name="", subject=f"step {step}",
                      detail=what)]


def decide(previous: Sequence[AlertRecord], conditions: Sequence[Condition], *,
           monitor: str, label: str, run_at: dt.datetime, policy: AlertPolicy,
           silenced: set[str | None]) -> tuple[RuleOutcome, list[Condition]]:
    """Apply the rules; conditions of silenced segments are held back (returned second)."""
    kept, held = [], []
    for condition in conditions:
        if None in silenced or condition.segment in silenced:
            held.append(condition)
        else:
            kept.append(condition)
    outcome = apply_rules(previous, kept, monitor=monitor, run_id=label, run_at=run_at,
                          persistence=policy.persistence_by_method(),
                          false_discovery_rate=policy.false_discovery_rate,
                          window_severity_cap=policy.window_severity_cap)
    return outcome, held


def record_row(record: AlertRecord) -> AlertRow:
    """The ``alerts`` table row of a record (its evidence with the rules' bookkeeping)."""
    key = record.key
    evidence = dict(record.evidence.to_dict()) if record.evidence else {}
    evidence.update(alert=record.alert_id, episode=record.episode, recent=record.recent,
                    opened_run=record.opened_run, resolved_run=record.resolved_run)
    return AlertRow(model=key.model, kind=key.kind, severity=record.severity,
                    message=record.message or key.kind, evidence=evidence, state=record.state,
                    snooze_until=record.snoozed_until, segment=key.segment)


def alert_rows(outcome: RuleOutcome, conditions: Sequence[Condition]) -> list[AlertRow]:
    """Rows for the ``alerts`` table: every event, and every active alert seen this run."""
    seen = {condition.key_parts for condition in conditions}
    changed = {event.record.key for event in outcome.events}
    return [record_row(record) for record in outcome.records
            if record.key in changed or (record.is_active and (
                record.key.segment, record.key.model, record.key.kind) in seen)]


def retire(records: Sequence[AlertRecord], chosen: Mapping[str, str], *, label: str,
           run_at: dt.datetime) -> tuple[list[AlertRecord], list[AlertRecord]]:
    """Resolve the active alerts of models that are no longer chosen in their segment.

    After a promotion the old model's alerts have nobody to act on them; they
    are closed with a message saying why.  Returns (all records, the retired ones).
    """
    kept, retired = [], []
    for record in records:
        key = record.key
        if record.is_active and key.model and key.segment in chosen \
                and key.model != chosen[key.segment]:
            where = f" in segment {key.segment!r}" if key.segment else ""
            record = replace(record, state="resolved", resolved_run=label, resolved_at=run_at,
                             snoozed_until=None,
                             message=f"Resolved{where}: {key.model!r} is no longer the chosen "
                             f"model ({chosen[key.segment]!r} is), so this alert was closed.")
            retired.append(record)
        kept.append(record)
    return kept, retired


def event_summary(events: Sequence[AlertEvent]) -> tuple[dict[str, Any], ...]:
    """Plain dicts of a run's events, for :class:`~monitor.runs.run.RunOutcome`."""
    return tuple({"event": e.event, "alert": e.record.alert_id, "kind": e.record.key.kind,
                  "segment": e.record.key.segment, "model": e.record.key.model,
                  "severity": e.record.severity, "state": e.record.state,
                  "message": e.record.message} for e in events)


def delivery_rows(events: Sequence[AlertEvent], monitor: MonitorSpec, *, label: str,
                  created_at: dt.datetime) -> list[DeliveryRow]:
    """One outbox row per target that the run's events reach (grouped per run)."""
    if not events or not monitor.notify:
        return []
    routes = [_Route(t.name, t.min_severity) for t in monitor.notify]
    messages = build_messages(events, routes, monitor=monitor.name, run_id=label,
                              created_at=created_at)
    return [DeliveryRow(target=m.target, idempotency_key=m.idempotency_key,
                        payload=m.to_dict(), message_id=f"<{m.idempotency_key}@regwarden>")
            for m in messages]


@dataclass(frozen=True, slots=True)
class _Route:
    name: str
    minimum_severity: str

    def send(self, message: Message, environ: Mapping[str, str]) -> str:  # pragma: no cover
        raise SendError("routing only")


# ----------------------------------------------------------------------------- the watch


def _time_microseconds(batch: pa.RecordBatch, column: str) -> np.ndarray:
    times = batch.column(batch.schema.get_field_index(column))
    if pa.types.is_date(times.type):
        times = pc.cast(times, pa.timestamp("us"))
    times = pc.cast(times, pa.timestamp("us", tz="UTC"))
    return np.asarray(pc.cast(times, pa.int64()).to_numpy(zero_copy_only=False),
                      dtype=np.int64)


def _micros(moment: dt.datetime) -> int:
    return int((moment - dt.datetime(1970, 1, 1, tzinfo=dt.UTC)) / dt.timedelta(microseconds=1))


def gather_rows(scan: Iterable[pa.RecordBatch], design: Any, *, time_column: str,
                segment_column: str | None, segment: str, after: dt.datetime | None = None,
                not_before: dt.datetime | None = None,
                skip: Sequence[tuple[dt.datetime, dt.datetime]] = ()
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Encoded rows of a scan (union columns, response, times in µs), in time order.

    Only rows usable by every candidate, of the segment, with time after
    ``after`` and not before ``not_before``, and outside the ``skip`` ranges.
    """
    xs, ys, ts = [], [], []
    for batch in scan:
        if segment_column:
            column = batch.column(batch.schema.get_field_index(segment_column))
            batch = batch.filter(pc.equal(pc.cast(column, pa.string()), segment))
            if batch.num_rows == 0:
                continue
        times = _time_microseconds(batch, time_column)
        encoded = design.encode(arrow_to_columns(batch))
        times = times[encoded.usable]
        keep = np.ones(times.size, dtype=bool)
        if after is not None:
            keep &= times > _micros(after)
        if not_before is not None:
            keep &= times >= _micros(not_before)
        for start, end in skip:
            keep &= ~((times >= _micros(start)) & (times < _micros(end)))
        xs.append(np.asarray(encoded.X, dtype=np.float64)[keep])
        ys.append(np.asarray(encoded.y, dtype=np.float64)[keep])
        ts.append(times[keep])
    if not xs:
        width = len(design.columns)
        return np.zeros((0, width)), np.zeros(0), np.zeros(0, dtype=np.int64)
    X, y, t = np.vstack(xs), np.concatenate(ys), np.concatenate(ts)
    order = np.argsort(t, kind="stable")
    return X[order], y[order], t[order]


@dataclass(frozen=True, slots=True)
class WatchLayout:
    """The reference's columns for the chosen model and the candidates that nest it."""

    union: tuple[int, ...]        # design column indices, in reference order after any ones
    has_ones: bool
    labels: tuple[str, ...]
    chosen: tuple[int, ...]
    watched: tuple[int, ...]
    larger: tuple[tuple[int, ...], ...]
    chosen_has_intercept: bool = field(default=True)

    def local(self, X: np.ndarray) -> np.ndarray:
        parts = [np.ones((X.shape[0], 1))] if self.has_ones else []
        parts.append(X[:, list(self.union)])
        return np.hstack(parts) if parts else X


def watch_layout(design: Any, names: Sequence[str], chosen: str,
                 nesting: Sequence[tuple[str, str]]) -> WatchLayout:
    """Columns of the chosen model and of every candidate that nests it."""
    index = list(names).index(chosen)
    columns, has_intercept = design.models[index]
    larger = [design.models[list(names).index(big)] for small, big in nesting
              if small == chosen]
    union = sorted(set(columns).union(*(set(c) for c, _ in larger)))
    has_ones = has_intercept or any(intercept for _, intercept in larger)
    offset = 1 if has_ones else 0
    position = {column: offset + i for i, column in enumerate(union)}

    def model(cols: Sequence[int], intercept: bool) -> tuple[int, ...]:
        return ((0,) if intercept else ()) + tuple(position[c] for c in cols)

    labels = (("Intercept",) if has_ones else ()) + tuple(design.columns[c].label for c in union)
    return WatchLayout(tuple(union), has_ones, labels, model(columns, has_intercept),
                       tuple(position[c] for c in columns),
                       tuple(model(c, i) for c, i in larger), has_intercept)


def r_squared_of(X: np.ndarray, y: np.ndarray, columns: Sequence[int],
                 has_intercept: bool) -> float | None:
    """R² of a least-squares fit on the given columns (centred when there is an intercept)."""
    if X.shape[0] <= len(columns):
        return None
    design = X[:, list(columns)]
    coefficients, *_ = np.linalg.lstsq(design, y, rcond=None)
    ssr = float(np.sum((y - design @ coefficients) ** 2))
    total = float(np.sum((y - y.mean()) ** 2)) if has_intercept else float(np.sum(y ** 2))
    return 1.0 - ssr / total if total > 0 else None


def baseline_identity(snapshot: Any, model: str) -> str:
    """Text naming a baseline snapshot (window, rows, formulas) and the chosen model."""
    text = json.dumps([model, snapshot.window_start, snapshot.window_end, snapshot.n,
                       list(snapshot.formulas)], default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:24]


def advance_watch(entry: WatchEntry | None, *, identity: str, layout: WatchLayout,
                  reference_rows: Callable[[], tuple[np.ndarray, np.ndarray, float]],
                  new_rows: Callable[[bool], tuple[np.ndarray, np.ndarray]],
                  settings: AlertSettings, model: str, segment: str
                  ) -> tuple[WatchEntry | None, list[Condition], str]:
    """Start (or restart) the watch when needed, then score the new rows.

    ``reference_rows()`` returns the baseline rows (local columns) and the rows
    per night estimated from them; ``new_rows(started_now)`` the rows to score.
    Returns the entry to keep, the conditions and a note for the run's detail.
    """
    from threadpoolctl import threadpool_limits

    # small matrices only (the charts' calibration solves 300 x 300 systems): BLAS
    # threads cost more than they give, a lot more on a loaded machine
    with threadpool_limits(limits=1, user_api="blas"):
        return _advance_watch(entry, identity=identity, layout=layout,
                              reference_rows=reference_rows, new_rows=new_rows,
                              settings=settings, model=model, segment=segment)


def _advance_watch(entry: WatchEntry | None, *, identity: str, layout: WatchLayout,
                   reference_rows: Callable[[], tuple[np.ndarray, np.ndarray, float]],
                   new_rows: Callable[[bool], tuple[np.ndarray, np.ndarray]],
                   settings: AlertSettings, model: str, segment: str
                   ) -> tuple[WatchEntry | None, list[Condition], str]:
    from ..stats.sequential import ForecastReference

    started = entry is None or entry.baseline != identity or entry.model != model \
        or entry.columns != layout.labels
    if started:
        X_ref, y_ref, per_night = reference_rows()
        if X_ref.shape[0] <= len(layout.labels) + 1:
            return None, [], (f"watch not started: the baseline has {X_ref.shape[0]} usable "
                              f"rows for {len(layout.labels)} columns")
        r2 = r_squared_of(X_ref, y_ref, layout.chosen, layout.chosen_has_intercept)
        entry = WatchEntry(segment, model, identity, layout.labels, layout.chosen,
                           layout.watched, layout.larger,
                           settings.rows_per_night or per_night, r2,
                           WatchState(ForecastReference.from_rows(X_ref, y_ref)))
    assert entry is not None
    if not settings.sequential_watch:
        return entry, [], "sequential watch switched off"
    X_new, y_new = new_rows(started)
    policy = policy_of(settings, entry.rows_per_night)
    try:
        state, conditions = watch_night(
            entry.state, X_new, y_new, policy=policy, model=model, column_labels=entry.columns,
            chosen_columns=entry.chosen, watched_columns=entry.watched,
            larger_candidates=entry.larger, segment=segment)
    except ValueError as error:  # a degenerate reference: say so, keep the run going
        return entry, [], f"watch skipped: {error}"
    note = (f"{'started, ' if started else ''}{X_new.shape[0]} new rows scored, "
            f"{entry.rows_per_night:.3g} rows per night")
    return replace(entry, state=state), conditions, note


# ----------------------------------------------------------------------------- delivery


class _EnvWebhook:
    """A webhook whose address may come from the environment at send time."""

    def __init__(self, spec: NotifySpec) -> None:
        self.name = spec.name
        self.minimum_severity = spec.min_severity
        self.spec = spec

    def send(self, message: Message, environ: Mapping[str, str]) -> str:
        url = self.spec.url or environ.get(self.spec.url_env or "", "")
        if not url:
            raise SendError(f"environment variable {self.spec.url_env} (the address of "
                            f"target {self.name!r}) is not set")
        try:
            target = WebhookTarget(self.name, url, self.minimum_severity,
                                   self.spec.timeout_seconds, self.spec.secret_env or "")
        except ConfigurationError as error:
            raise SendError(str(error)) from error
        return target.send(message, environ)


class _Broken:
    """A target that cannot be built (e.g. its function does not import): messages wait."""

    def __init__(self, name: str, severity: str, problem: str) -> None:
        self.name = name
        self.minimum_severity = severity
        self.problem = problem

    def send(self, message: Message, environ: Mapping[str, str]) -> str:
        raise SendError(self.problem)


def build_targets(monitor: MonitorSpec,
                  functions: Mapping[str, Callable[[dict[str, Any]], Any]] | None = None
                  ) -> list[Target]:
    """The monitor's notification targets; ``functions`` maps a callable target's name
    to a Python function (for ETL jobs), overriding its ``function`` key."""
    targets: list[Target] = []
    for spec in monitor.notify:
        try:
            if spec.kind == "log":
                targets.append(LogTarget(spec.name, spec.min_severity))
            elif spec.kind == "jsonl":
                targets.append(JsonLinesTarget(spec.name, str(spec.path), spec.min_severity))
            elif spec.kind == "webhook":
                targets.append(_EnvWebhook(spec))
            elif spec.kind == "email":
                assert spec.host is not None and spec.sender is not None
                targets.append(EmailTarget(
                    spec.name, spec.host, spec.sender, spec.recipients, spec.port,
                    spec.security, spec.username_env or "", spec.password_env or "",
                    spec.min_severity, spec.timeout_seconds))
            else:
                function = (functions or {}).get(spec.name)
                targets.append(CallableTarget(spec.name, function=function,
                                              function_path="" if function else
                                              spec.function or "",
                                              minimum_severity=spec.min_severity))
        except ConfigurationError as error:
            targets.append(_Broken(spec.name, spec.min_severity, str(error)))
    return targets


class StoreOutbox:
    """The colleague's :class:`~monitor.runs.delivery.Outbox` over the store's deliveries table.

    Only the messages of one monitor are handed out (targets are configured per
    monitor).  ``respect_backoff=False`` (a run, ``regwarden deliver``) hands out
    every undelivered message at once; with True only those whose next attempt
    time has come (for a retrier that runs between runs).
    """

    def __init__(self, store: HistoryStore, monitor: str, *, respect_backoff: bool = False
                 ) -> None:
        self.store = store
        self.monitor = monitor
        self.respect_backoff = respect_backoff
        self._ids: dict[str, int] = {}

    def add(self, messages: Sequence[Message]) -> None:
        self.store.enqueue_deliveries([DeliveryRow(
            target=m.target, idempotency_key=m.idempotency_key, payload=m.to_dict(),
            message_id=f"<{m.idempotency_key}@regwarden>") for m in messages])

    def due(self, now: dt.datetime) -> list[PendingDelivery]:
        horizon = now if self.respect_backoff else now + dt.timedelta(days=36_500)
        pending = []
        for row in self.store.due_deliveries(now=horizon, limit=1_000_000):
            payload = row.payload or {}
            if payload.get("monitor") != self.monitor:
                continue
            self._ids[row.idempotency_key] = row.delivery_id
            pending.append((row.created_at, row.delivery_id, PendingDelivery(
                Message.from_dict(payload), row.attempts, row.next_attempt_at,
                row.last_error or "", row.delivered_at)))
        return [item for _, _, item in sorted(pending, key=lambda p: (p[0], p[1]))]

    def mark_failed(self, key: str, *, attempted_at: dt.datetime, error: str,
                    next_attempt_at: dt.datetime) -> None:
        self.store.mark_delivery_failed(self._ids[key], error, retry_at=next_attempt_at)

    def mark_delivered(self, key: str, *, delivered_at: dt.datetime, receipt: str) -> None:
        self.store.mark_delivered(self._ids[key], now=delivered_at)


def deliver_monitor(store: HistoryStore, monitor: MonitorSpec, *, now: dt.datetime,
                    functions: Mapping[str, Callable[[dict[str, Any]], Any]] | None = None,
                    sleep: Callable[[float], None] | None = None,
                    respect_backoff: bool = False) -> DeliveryReport:
    """Send the monitor's undelivered messages (this run's and every earlier one's)."""
    import time

    settings = monitor.delivery
    retry = RetryPolicy(attempts_per_pass=settings.tries_per_pass,
                        pause_seconds=settings.pause_seconds,
                        base_delay=dt.timedelta(minutes=settings.first_backoff_minutes),
                        max_delay=dt.timedelta(minutes=settings.longest_backoff_minutes))
    outbox = StoreOutbox(store, monitor.name, respect_backoff=respect_backoff)
    return deliver_pending(outbox, build_targets(monitor, functions), now=now, retry=retry,
                           sleep=sleep or time.sleep)
