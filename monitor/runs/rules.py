"""Alert rules: from one run's conditions to opened, updated and resolved alerts.

Everything here is pure: the previous alert records and this run's conditions go
in, new records and the events worth telling someone about come out.  Records
are frozen dataclasses with ``to_dict``/``from_dict``, so the history store can
keep them as rows.

The rules, in the order they are applied to one run:

1. **Data problems first.**  A breached data-problem condition (no new rows, too
   few rows, too many dropped rows, unseen levels, schema change, source
   unreachable) suppresses every model-quality condition of the same run and
   segment (monitor-wide data problems suppress all segments): a suppressed
   condition counts neither as a breach nor as a clean run.
2. **False-discovery control across the night.**  Every fixed-window condition
   that carries a p-value enters one Benjamini–Hochberg procedure at level
   ``false_discovery_rate``; only rejected ones stay breached, the others are
   downgraded to "watch" (neither breached nor clean).
3. **Persistence.**  An alert opens when its key was breached in at least
   ``open_after_runs`` of the last ``out_of_last_runs`` evaluated runs, and
   resolves after ``clear_after_clean_runs`` clean runs in a row.  A "watch"
   verdict (borderline) breaks the clean streak without counting as a breach,
   so a value near its threshold does not flap.
4. **People.**  An acknowledged alert stays acknowledged until it resolves; a
   snoozed alert is silent until its snooze ends and then, if still breached,
   becomes open again and is announced once more.

References
----------
Benjamini, Y., Hochberg, Y. (1995). Controlling the false discovery rate: a
practical and powerful approach to multiple testing. JRSS B 57(1), 289-300.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import datetime
from typing import Any

import numpy as np

from ..errors import ConfigurationError

__all__ = [
    "ALERT_KINDS",
    "AlertEvent",
    "AlertKey",
    "AlertKind",
    "AlertRecord",
    "Condition",
    "Evidence",
    "Persistence",
    "RuleOutcome",
    "SEVERITIES",
    "acknowledge",
    "apply_rules",
    "benjamini_hochberg",
    "severity_at_least",
    "snooze",
]

SEVERITIES = ("info", "warning", "critical")
#: verdicts a condition can carry
VERDICTS = ("breached", "watch", "clean")
#: how a condition was reached
METHODS = ("sequential", "window", "data", "schedule")
#: states of an alert record; "quiet" = tracked, never opened or resolved long ago
STATES = ("quiet", "open", "acknowledged", "snoozed", "resolved")
#: how often a record's state was written in this shape (checked by from_dict)
RECORD_VERSION = 1


def severity_at_least(severity: str, minimum: str) -> bool:
    """Whether ``severity`` is ``minimum`` or more serious."""
    return SEVERITIES.index(severity) >= SEVERITIES.index(minimum)


@dataclass(frozen=True, slots=True)
class AlertKind:
    """One kind of alert: its group, default severity and a plain-words phrase."""

    name: str
    group: str  # "model" (model quality), "data" or "schedule"
    default_severity: str
    phrase: str


ALERT_KINDS: Mapping[str, AlertKind] = {kind.name: kind for kind in (
    AlertKind("chosen_outranked", "model", "warning",
              "a larger candidate now explains the data better than the chosen model"),
    AlertKind("chosen_not_significant", "model", "critical",
              "the chosen model no longer explains the response better than its mean"),
    AlertKind("fit_degraded", "model", "critical",
              "forecasts have become less accurate than at the baseline"),
    AlertKind("assumption_normality", "model", "warning",
              "the residuals no longer look normally distributed"),
    AlertKind("assumption_constant_variance", "model", "warning",
              "the spread of the residuals changes with the inputs"),
    AlertKind("assumption_independence", "model", "warning",
              "consecutive errors have become correlated"),
    AlertKind("assumption_functional_form", "model", "warning",
              "the straight-line form of the model no longer fits"),
    AlertKind("assumption_collinearity", "model", "warning",
              "inputs have become nearly redundant"),
    AlertKind("assumption_influence", "model", "warning",
              "a few rows dominate the fit"),
    AlertKind("coefficients_unstable", "model", "warning",
              "a coefficient has moved away from its baseline value"),
    AlertKind("residual_drift", "model", "warning",
              "the distribution of the forecast errors has drifted"),
    AlertKind("input_drift", "model", "warning",
              "the distribution of an input has drifted"),
    AlertKind("extrapolation", "model", "warning",
              "new rows lie outside the range the model was fitted on"),
    AlertKind("data_no_new_rows", "data", "warning", "no new rows arrived since the last run"),
    AlertKind("data_too_few_rows", "data", "warning", "too few rows to fit the models"),
    AlertKind("data_too_many_dropped_rows", "data", "warning",
              "too many rows were dropped as unusable"),
    AlertKind("data_unseen_levels", "data", "warning",
              "a category column has values the models have never seen"),
    AlertKind("data_schema_changed", "data", "critical", "the source's columns have changed"),
    AlertKind("data_source_unreachable", "data", "critical", "the source could not be read"),
    AlertKind("run_failed", "data", "critical",
              "the run failed before it could judge the models"),
    AlertKind("missed_runs", "schedule", "warning", "scheduled runs did not happen"),
)}


def _kind(name: str) -> AlertKind:
    try:
        return ALERT_KINDS[name]
    except KeyError:
        raise ConfigurationError(f"unknown alert kind {name!r}", where="alert rules",
                                 hint="known kinds: " + ", ".join(sorted(ALERT_KINDS))) from None


# ----------------------------------------------------------------------------- inputs


@dataclass(frozen=True, slots=True)
class Condition:
    """One finding of one run, as any check, detector or data probe reports it.

    Attributes
    ----------
    kind
        An alert kind (see :data:`ALERT_KINDS`).
    verdict
        "breached", "watch" (borderline: neither breached nor clean) or "clean".
    method
        "sequential" (a run-length-controlled detector), "window" (a test on the
        night's window; with a p-value it enters Benjamini–Hochberg), "data" or
        "schedule".
    model, segment
        Which model and segment; "" when the finding concerns the whole monitor.
    statistic_name, statistic, threshold, p_value
        The evidence; ``p_value`` None when the check has none.
    subject
        What exactly was tested (a test name, a column): shown in the message.
    severity
        Severity proposed by the producer; the kind's default when None.
    detail
        A short plain-words addition for the message (may be "").
    """

    kind: str
    verdict: str
    method: str = "window"
    model: str = ""
    segment: str = ""
    statistic_name: str = ""
    statistic: float | None = None
    threshold: float | None = None
    p_value: float | None = None
    subject: str = ""
    severity: str | None = None
    detail: str = ""

    def __post_init__(self) -> None:
        _kind(self.kind)
        if self.verdict not in VERDICTS:
            raise ConfigurationError(f"condition verdict must be one of {VERDICTS}, got "
                                     f"{self.verdict!r}", where=f"condition {self.kind}")
        if self.method not in METHODS:
            raise ConfigurationError(f"condition method must be one of {METHODS}, got "
                                     f"{self.method!r}", where=f"condition {self.kind}")
        if self.severity is not None and self.severity not in SEVERITIES:
            raise ConfigurationError(f"severity must be one of {SEVERITIES}, got "
                                     f"{self.severity!r}", where=f"condition {self.kind}")

    @property
    def key_parts(self) -> tuple[str, str, str]:
        return (self.segment, self.model, self.kind)

    def to_dict(self) -> dict[str, Any]:
        return {name: _plain(getattr(self, name)) for name in self.__slots__}  # type: ignore[attr-defined]

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Condition:
        return cls(**{name: data.get(name, default)
                      for name, default in _CONDITION_DEFAULTS.items()})


_CONDITION_DEFAULTS: dict[str, Any] = {
    "kind": None, "verdict": None, "method": "window", "model": "", "segment": "",
    "statistic_name": "", "statistic": None, "threshold": None, "p_value": None,
    "subject": "", "severity": None, "detail": "",
}


def _plain(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


@dataclass(frozen=True, slots=True)
class Persistence:
    """How long a condition must last to open an alert, and stay away to clear it.

    ``open_after_runs`` breached runs among the last ``out_of_last_runs``
    evaluated runs open the alert; ``clear_after_clean_runs`` clean runs in a
    row resolve it.
    """

    open_after_runs: int = 1
    out_of_last_runs: int = 1
    clear_after_clean_runs: int = 1

    def __post_init__(self) -> None:
        if not 1 <= self.open_after_runs <= self.out_of_last_runs:
            raise ConfigurationError(
                f"open_after_runs must be between 1 and out_of_last_runs "
                f"({self.out_of_last_runs}), got {self.open_after_runs}",
                where="alert persistence", hint="e.g. open_after_runs 3, out_of_last_runs 5")
        if self.clear_after_clean_runs < 1:
            raise ConfigurationError(
                f"clear_after_clean_runs must be at least 1, got {self.clear_after_clean_runs}",
                where="alert persistence")

    def to_dict(self) -> dict[str, Any]:
        return {"open_after_runs": self.open_after_runs,
                "out_of_last_runs": self.out_of_last_runs,
                "clear_after_clean_runs": self.clear_after_clean_runs}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Persistence:
        return cls(int(data["open_after_runs"]), int(data["out_of_last_runs"]),
                   int(data["clear_after_clean_runs"]))


# ----------------------------------------------------------------------------- records


@dataclass(frozen=True, slots=True, order=True)
class AlertKey:
    """The stable identity of an alert: monitor, segment, model, kind."""

    monitor: str
    segment: str
    model: str
    kind: str

    def text(self) -> str:
        return "/".join((self.monitor, self.segment or "-", self.model or "-", self.kind))

    def to_dict(self) -> dict[str, str]:
        return {"monitor": self.monitor, "segment": self.segment, "model": self.model,
                "kind": self.kind}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> AlertKey:
        return cls(str(data["monitor"]), str(data["segment"]), str(data["model"]),
                   str(data["kind"]))


@dataclass(frozen=True, slots=True)
class Evidence:
    """Why an alert is (or was) raised: the strongest condition of the latest breached run."""

    statistic_name: str
    statistic: float | None
    threshold: float | None
    p_value: float | None
    adjusted_p_value: float | None
    method: str
    subject: str
    since_run: str
    detail: str = ""

    def to_dict(self) -> dict[str, Any]:
        return {name: _plain(getattr(self, name)) for name in self.__slots__}  # type: ignore[attr-defined]

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Evidence:
        return cls(str(data["statistic_name"]), _maybe_float(data.get("statistic")),
                   _maybe_float(data.get("threshold")), _maybe_float(data.get("p_value")),
                   _maybe_float(data.get("adjusted_p_value")), str(data["method"]),
                   str(data.get("subject", "")), str(data["since_run"]),
                   str(data.get("detail", "")))


def _maybe_float(value: Any) -> float | None:
    return None if value is None else float(value)


@dataclass(frozen=True, slots=True)
class AlertRecord:
    """The state of one alert key after a run.

    Attributes
    ----------
    state
        "quiet" (tracked, not alerting), "open", "acknowledged", "snoozed" or
        "resolved".
    recent, recent_runs
        Verdicts of the last evaluated runs, oldest first: "B" breached, "W"
        watch, "C" clean; suppressed runs are not recorded.  ``recent_runs``
        holds the matching run ids.
    clean_streak
        Clean runs in a row (counts toward clearing).
    episode
        How many times this key has opened (1 for the first alert); with the key
        it names one alert uniquely.
    opened_run, resolved_run, last_run
        Run ids; "" when not applicable.
    snoozed_until, acknowledged_by
        Set by people through :func:`snooze` / :func:`acknowledge`.
    message
        One line in plain words.
    """

    key: AlertKey
    state: str = "quiet"
    severity: str = "warning"
    recent: str = ""
    recent_runs: tuple[str, ...] = ()
    clean_streak: int = 0
    episode: int = 0
    evidence: Evidence | None = None
    opened_run: str = ""
    resolved_run: str = ""
    last_run: str = ""
    opened_at: datetime | None = None
    resolved_at: datetime | None = None
    snoozed_until: datetime | None = None
    acknowledged_by: str = ""
    message: str = ""

    @property
    def is_active(self) -> bool:
        """Open, acknowledged or snoozed: the condition has not cleared yet."""
        return self.state in ("open", "acknowledged", "snoozed")

    @property
    def alert_id(self) -> str:
        return f"{self.key.text()}#{self.episode}"

    def to_dict(self) -> dict[str, Any]:
        return {
            "record_version": RECORD_VERSION,
            "key": self.key.to_dict(), "state": self.state, "severity": self.severity,
            "recent": self.recent, "recent_runs": list(self.recent_runs),
            "clean_streak": self.clean_streak, "episode": self.episode,
            "evidence": None if self.evidence is None else self.evidence.to_dict(),
            "opened_run": self.opened_run, "resolved_run": self.resolved_run,
            "last_run": self.last_run,
            "opened_at": _iso(self.opened_at), "resolved_at": _iso(self.resolved_at),
            "snoozed_until": _iso(self.snoozed_until), "acknowledged_by": self.acknowledged_by,
            "message": self.message,
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> AlertRecord:
        version = int(data.get("record_version", 1))
        if version > RECORD_VERSION:
            raise ConfigurationError(
                f"alert record version {version} is newer than this regwarden understands "
                f"({RECORD_VERSION})", where="alert records", hint="upgrade regwarden")
        evidence = data.get("evidence")
        return cls(
            AlertKey.from_dict(data["key"]), str(data["state"]), str(data["severity"]),
            str(data.get("recent", "")), tuple(str(r) for r in data.get("recent_runs", ())),
            int(data.get("clean_streak", 0)),
            int(data.get("episode", 0)),
            None if evidence is None else Evidence.from_dict(evidence),
            str(data.get("opened_run", "")), str(data.get("resolved_run", "")),
            str(data.get("last_run", "")), _from_iso(data.get("opened_at")),
            _from_iso(data.get("resolved_at")), _from_iso(data.get("snoozed_until")),
            str(data.get("acknowledged_by", "")), str(data.get("message", "")),
        )


def _iso(moment: datetime | None) -> str | None:
    return None if moment is None else moment.isoformat()


def _from_iso(text: Any) -> datetime | None:
    return None if text is None else datetime.fromisoformat(str(text))


@dataclass(frozen=True, slots=True)
class AlertEvent:
    """Something worth telling people: "opened", "escalated", "reminder" (snooze ended
    while still breached) or "resolved"."""

    event: str
    record: AlertRecord

    def to_dict(self) -> dict[str, Any]:
        return {"event": self.event, "record": self.record.to_dict()}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> AlertEvent:
        return cls(str(data["event"]), AlertRecord.from_dict(data["record"]))


@dataclass(frozen=True, slots=True)
class RuleOutcome:
    """Result of :func:`apply_rules`: every tracked record after the run and the events."""

    records: tuple[AlertRecord, ...]
    events: tuple[AlertEvent, ...]
    suppressed: tuple[Condition, ...] = ()
    adjusted_p_values: tuple[tuple[Condition, float], ...] = ()

    @property
    def active(self) -> tuple[AlertRecord, ...]:
        return tuple(record for record in self.records if record.is_active)


# ----------------------------------------------------------------------------- BH


def benjamini_hochberg(p_values: Sequence[float], rate: float) -> tuple[tuple[bool, ...],
                                                                        tuple[float, ...]]:
    """Benjamini–Hochberg step-up procedure.

    Returns which hypotheses are rejected at false-discovery rate ``rate`` and
    the adjusted p-values ``p̃_(i) = min_{j≥i} min(1, m·p_(j)/j)`` (METHODS §11).
    Controls the FDR at ``(m₀/m)·rate`` for independent or positively dependent
    p-values.

    References
    ----------
    Benjamini, Y., Hochberg, Y. (1995). JRSS B 57(1), 289-300.
    """
    p = np.asarray(p_values, dtype=np.float64)
    m = p.size
    if m == 0:
        return (), ()
    if np.any(~np.isfinite(p)) or np.any((p < 0) | (p > 1)):
        raise ValueError("p-values must lie in [0, 1]")
    order = np.argsort(p, kind="stable")
    ranked = p[order] * m / np.arange(1, m + 1)
    adjusted_sorted = np.minimum(1.0, np.minimum.accumulate(ranked[::-1])[::-1])
    adjusted = np.empty(m)
    adjusted[order] = adjusted_sorted
    passing = np.nonzero(p[order] <= rate * np.arange(1, m + 1) / m)[0]
    rejected = np.zeros(m, dtype=bool)
    if passing.size:
        rejected[order[: passing[-1] + 1]] = True
    return tuple(bool(r) for r in rejected), tuple(float(a) for a in adjusted)


# ----------------------------------------------------------------------------- the run


def apply_rules(
    previous: Iterable[AlertRecord],
    conditions: Sequence[Condition],
    *,
    monitor: str,
    run_id: str,
    run_at: datetime,
    persistence: Mapping[str, Persistence],
    false_discovery_rate: float = 0.05,
    window_severity_cap: str = "warning",
) -> RuleOutcome:
    """Turn one run's conditions into alert records and events.

    Parameters
    ----------
    previous
        The records after the last run (any order); keys not seen this run keep
        their state (a check that did not run says nothing).
    conditions
        This run's findings.
    persistence
        Persistence per method ("sequential", "window", "data", "schedule").
    false_discovery_rate
        Level of the Benjamini–Hochberg procedure across the run's window
        conditions that carry a p-value.
    window_severity_cap
        Highest severity a fixed-window condition may open at.
    """
    for method in METHODS:
        if method not in persistence:
            raise ConfigurationError(f"no persistence given for {method!r} conditions",
                                     where="alert rules")
    # 1. data problems suppress model-quality findings of the same segment
    broken_segments = {c.segment for c in conditions
                       if ALERT_KINDS[c.kind].group == "data" and c.verdict == "breached"}
    kept: list[Condition] = []
    suppressed: list[Condition] = []
    for condition in conditions:
        is_model = ALERT_KINDS[condition.kind].group == "model"
        if is_model and ("" in broken_segments or condition.segment in broken_segments):
            suppressed.append(condition)
        else:
            kept.append(condition)
    # 2. BH across the window conditions with p-values
    tested = [i for i, c in enumerate(kept) if c.method == "window" and c.p_value is not None]
    adjusted: dict[int, float] = {}
    if tested:
        rejected, adjusted_values = benjamini_hochberg(
            [float(kept[i].p_value) for i in tested], false_discovery_rate)  # type: ignore[arg-type]
        for i, is_rejected, value in zip(tested, rejected, adjusted_values, strict=True):
            adjusted[i] = value
            if kept[i].verdict == "breached" and not is_rejected:
                kept[i] = replace(kept[i], verdict="watch")
            elif kept[i].verdict == "clean" and is_rejected:
                kept[i] = replace(kept[i], verdict="watch")
    # 3. one verdict per key: the worst of its conditions
    rank = {"clean": 0, "watch": 1, "breached": 2}
    by_key: dict[AlertKey, list[tuple[Condition, float | None]]] = {}
    for i, condition in enumerate(kept):
        key = AlertKey(monitor, condition.segment, condition.model, condition.kind)
        by_key.setdefault(key, []).append((condition, adjusted.get(i)))
    records = {record.key: record for record in previous}
    events: list[AlertEvent] = []
    for key, found in by_key.items():
        worst = max(found, key=lambda pair: (rank[pair[0].verdict], _strength(pair[0])))
        condition, adjusted_p = worst
        rule = persistence[condition.method]
        record = records.get(key, AlertRecord(key))
        record = _release_snooze(record, run_at, events)
        record, event = _advance(record, condition, adjusted_p, rule, run_id, run_at,
                                 window_severity_cap)
        records[key] = record
        if event is not None:
            events.append(AlertEvent(event, record))
    # snoozes end on their own even for keys without findings this run
    for key, record in list(records.items()):
        if key not in by_key:
            records[key] = _release_snooze(record, run_at, events)
    ordered = tuple(sorted(records.values(), key=lambda r: r.key))
    return RuleOutcome(ordered, tuple(events), tuple(suppressed),
                       tuple((kept[i], adjusted[i]) for i in tested))


def _strength(condition: Condition) -> float:
    """Orders conditions of equal verdict: smaller p-value, then larger statistic/threshold."""
    if condition.p_value is not None:
        return -math.log(max(condition.p_value, 1e-300))
    if condition.statistic is not None and condition.threshold:
        return abs(condition.statistic / condition.threshold)
    return 0.0


def _release_snooze(record: AlertRecord, run_at: datetime, events: list[AlertEvent]) -> AlertRecord:
    if record.state == "snoozed" and record.snoozed_until is not None \
            and run_at >= record.snoozed_until:
        record = replace(record, state="open", snoozed_until=None)
        if record.recent.endswith("B"):
            events.append(AlertEvent("reminder", record))
    return record


def _advance(record: AlertRecord, condition: Condition, adjusted_p: float | None,
             rule: Persistence, run_id: str, run_at: datetime,
             window_cap: str) -> tuple[AlertRecord, str | None]:
    letter = {"breached": "B", "watch": "W", "clean": "C"}[condition.verdict]
    keep = max(rule.out_of_last_runs, 1)
    recent = (record.recent + letter)[-keep:]
    recent_runs = (*record.recent_runs, run_id)[-keep:]
    clean_streak = record.clean_streak + 1 if letter == "C" else 0
    severity = condition.severity or ALERT_KINDS[condition.kind].default_severity
    if condition.method == "window" and severity_at_least(severity, window_cap):
        severity = window_cap
    record = replace(record, recent=recent, recent_runs=recent_runs, clean_streak=clean_streak,
                     last_run=run_id)
    if letter == "B":
        since = record.evidence.since_run if (record.is_active and record.evidence) else ""
        if not since:  # the first breached run still inside the persistence window
            since = next(run for run, seen in zip(recent_runs, recent, strict=True) if seen == "B")
        evidence = Evidence(condition.statistic_name, condition.statistic, condition.threshold,
                            condition.p_value, adjusted_p, condition.method, condition.subject,
                            since, condition.detail)
        record = replace(record, evidence=evidence)
    if record.is_active:
        if clean_streak >= rule.clear_after_clean_runs:
            resolved = replace(record, state="resolved", resolved_run=run_id, resolved_at=run_at,
                               snoozed_until=None)
            return replace(resolved, message=compose_message(resolved)), "resolved"
        if letter == "B" and SEVERITIES.index(severity) > SEVERITIES.index(record.severity):
            escalated = replace(record, severity=severity)
            escalated = replace(escalated, message=compose_message(escalated))
            if escalated.state == "acknowledged":
                escalated = replace(escalated, state="open", acknowledged_by="")
            return escalated, "escalated"
        return replace(record, message=compose_message(record)), None
    if letter == "B" and recent.count("B") >= rule.open_after_runs:
        opened = replace(record, state="open", severity=severity, episode=record.episode + 1,
                         opened_run=run_id, opened_at=run_at, resolved_run="", resolved_at=None,
                         acknowledged_by="", snoozed_until=None)
        return replace(opened, message=compose_message(opened)), "opened"
    return record, None


# ----------------------------------------------------------------------------- people


def acknowledge(record: AlertRecord, *, by: str) -> AlertRecord:
    """Mark an active alert as acknowledged (it stays so until it resolves)."""
    if not record.is_active:
        raise ConfigurationError(f"alert {record.alert_id} is {record.state}, not active",
                                 where="acknowledge", hint="only open or snoozed alerts can be "
                                 "acknowledged")
    return replace(record, state="acknowledged", acknowledged_by=by, snoozed_until=None)


def snooze(record: AlertRecord, *, until: datetime, now: datetime) -> AlertRecord:
    """Silence an active alert until ``until`` (timezone-aware, after ``now``)."""
    if until.tzinfo is None:
        raise ConfigurationError(f"snooze time {until.isoformat()} has no time zone",
                                 where="snooze", hint="give it with an offset, e.g. +00:00")
    if until <= now:
        raise ConfigurationError(f"snooze time {until.isoformat()} is not in the future",
                                 where="snooze", hint="give a later time")
    if not record.is_active:
        raise ConfigurationError(f"alert {record.alert_id} is {record.state}, not active",
                                 where="snooze", hint="only open or acknowledged alerts can be "
                                 "snoozed")
    return replace(record, state="snoozed", snoozed_until=until)


# ----------------------------------------------------------------------------- words


def compose_message(record: AlertRecord) -> str:
    """One line in plain words for a record (what, where, evidence, since when)."""
    kind = ALERT_KINDS[record.key.kind]
    where = []
    if record.key.model:
        where.append(f"model {record.key.model!r}")
    if record.key.segment:
        where.append(f"segment {record.key.segment!r}")
    place = (" in " + ", ".join(where)) if where else ""
    if record.state == "resolved":
        return (f"Resolved{place}: {kind.phrase} no longer holds "
                f"(clean since run {record.resolved_run}).")
    text = f"{record.severity.capitalize()}{place}: {kind.phrase}"
    evidence = record.evidence
    if evidence is not None:
        parts = []
        if evidence.subject and evidence.subject != evidence.statistic_name:
            parts.append(evidence.subject)
        if evidence.statistic is not None:
            measure = f"{evidence.statistic_name or 'statistic'} {_num(evidence.statistic)}"
            if evidence.threshold is not None:
                measure += f" against a limit of {_num(evidence.threshold)}"
            parts.append(measure)
        if evidence.p_value is not None:
            parts.append(f"p = {_num(evidence.p_value)}")
        if evidence.adjusted_p_value is not None:
            parts.append(f"adjusted p = {_num(evidence.adjusted_p_value)}")
        if parts:
            text += " (" + ", ".join(parts) + ")"
        if evidence.since_run:
            text += f", since run {evidence.since_run}"
        if evidence.detail:
            text += f"; {evidence.detail}"
    return text + "."


def _num(value: float) -> str:
    if value == 0 or 1e-3 <= abs(value) < 1e5:
        return f"{value:.4g}"
    return f"{value:.2e}"
