"""Plain records the history store reads and writes.

Every writer method accepts these frozen dataclasses or plain mappings with the
same keys (``MetricRow(**mapping)`` is what happens to a mapping).  Instants are
timezone-aware UTC ``datetime`` objects; ``segment`` is ``''`` for the whole data.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import json
from collections.abc import Iterable, Mapping
from typing import Any, TypeVar

from monitor.errors import StorageError

__all__ = [
    "AlertRow",
    "BaselineRow",
    "BaselineSnapshot",
    "CheckRow",
    "CoefficientRow",
    "ComparisonRow",
    "Delivery",
    "DeliveryRow",
    "MetricRow",
    "RunRecord",
    "SlotClaim",
    "SourceFile",
    "VerdictRow",
    "alert_key",
]

#: States an alert can be in.
ALERT_STATES = ("open", "acknowledged", "snoozed", "resolved")


@dataclasses.dataclass(frozen=True, slots=True)
class SlotClaim:
    """The right to run one scheduled slot of one monitor, returned by ``claim_slot``.

    ``attempt`` counts from 1; ``lease_until`` is when another owner may take
    the slot over if this one has neither completed, failed nor renewed it.
    """

    monitor: str
    slot_at: dt.datetime
    attempt: int
    owner: str
    claimed_at: dt.datetime
    lease_until: dt.datetime


@dataclasses.dataclass(frozen=True, slots=True)
class RunRecord:
    """What a run says about itself (the ``runs`` row besides its key and status).

    The window is half-open: ``[window_start, window_end)``.  ``rows_read`` counts
    rows delivered by the source, ``rows_dropped`` those left out (e.g. missing
    values).  ``watermark_at`` is the latest time value read.  ``timings`` maps
    step names to seconds.
    """

    window_start: dt.datetime | None = None
    window_end: dt.datetime | None = None
    rows_read: int | None = None
    rows_dropped: int | None = None
    watermark_at: dt.datetime | None = None
    started_at: dt.datetime | None = None
    finished_at: dt.datetime | None = None
    timings: Mapping[str, float] | None = None
    detail: Mapping[str, Any] | None = None


@dataclasses.dataclass(frozen=True, slots=True)
class MetricRow:
    """One scalar measure of one model in one run (R², AIC, Δ, weight, ...)."""

    model: str
    metric: str
    value: float | None
    segment: str = ""


@dataclasses.dataclass(frozen=True, slots=True)
class CoefficientRow:
    """One coefficient of one model; ``ci_level`` is e.g. 0.95 for the bounds given."""

    model: str
    term: str
    estimate: float | None
    std_error: float | None = None
    ci_lower: float | None = None
    ci_upper: float | None = None
    ci_level: float | None = None
    p_value: float | None = None
    segment: str = ""


@dataclasses.dataclass(frozen=True, slots=True)
class CheckRow:
    """One assumption check of one model.

    ``df``/``df2`` are the degrees of freedom of the reference distribution
    (``df2`` only for two-parameter ones such as F).  ``is_exact`` is False when
    the statistic came from a sample of the rows; ``sample_size`` then says how
    many; ``rows`` is how many rows the window had.
    """

    model: str
    check: str
    verdict: str
    statistic: float | None = None
    p_value: float | None = None
    df: float | None = None
    df2: float | None = None
    is_exact: bool | None = None
    sample_size: int | None = None
    rows: int | None = None
    detail: Mapping[str, Any] | None = None
    segment: str = ""


@dataclasses.dataclass(frozen=True, slots=True)
class ComparisonRow:
    """One test comparing ``model`` with ``other_model`` (e.g. a partial F-test)."""

    model: str
    other_model: str
    test: str
    statistic: float | None = None
    p_value: float | None = None
    df: float | None = None
    df2: float | None = None
    verdict: str | None = None
    detail: Mapping[str, Any] | None = None
    segment: str = ""


@dataclasses.dataclass(frozen=True, slots=True)
class VerdictRow:
    """Which candidate was best by one ``criterion`` and whether it is the chosen one."""

    criterion: str
    best_model: str | None
    chosen_model: str | None = None
    is_chosen_best: bool | None = None
    margin: float | None = None
    detail: Mapping[str, Any] | None = None
    segment: str = ""


@dataclasses.dataclass(frozen=True, slots=True)
class BaselineRow:
    """A baseline summary to keep (its payload is JSON-able data)."""

    model: str
    payload: Mapping[str, Any]
    format_version: int = 1
    window_start: dt.datetime | None = None
    window_end: dt.datetime | None = None
    segment: str = ""


@dataclasses.dataclass(frozen=True, slots=True)
class BaselineSnapshot:
    """A stored baseline, as read back by ``HistoryStore.latest_baseline``."""

    baseline_id: int
    monitor: str
    segment: str
    model: str
    run_id: int | None
    created_at: dt.datetime
    window_start: dt.datetime | None
    window_end: dt.datetime | None
    format_version: int
    payload: Mapping[str, Any]


@dataclasses.dataclass(frozen=True, slots=True)
class AlertRow:
    """One alert seen in a run.

    ``state=None`` keeps the state people gave the alert (acknowledged,
    snoozed) and reopens a resolved one; an explicit state overrides.
    """

    model: str
    kind: str
    severity: str
    message: str
    evidence: Mapping[str, Any] | None = None
    state: str | None = None
    snooze_until: dt.datetime | None = None
    segment: str = ""


@dataclasses.dataclass(frozen=True, slots=True)
class DeliveryRow:
    """One notification to put in the outbox.

    ``idempotency_key`` is unique across the store: enqueueing the same key
    again is a no-op.  ``alert_key`` (see :func:`alert_key`) links it to an alert.
    """

    target: str
    idempotency_key: str
    payload: Mapping[str, Any] | None = None
    alert_key: str | None = None
    message_id: str | None = None
    next_attempt_at: dt.datetime | None = None


@dataclasses.dataclass(frozen=True, slots=True)
class Delivery:
    """An outbox entry as read back by ``HistoryStore.due_deliveries``."""

    delivery_id: int
    alert_id: int | None
    message_id: str | None
    run_id: int | None
    target: str
    idempotency_key: str
    payload: Mapping[str, Any] | None
    attempts: int
    created_at: dt.datetime
    next_attempt_at: dt.datetime | None
    delivered_at: dt.datetime | None
    last_error: str | None


@dataclasses.dataclass(frozen=True, slots=True)
class SourceFile:
    """A source file read by a run: the entry of the incremental file ledger.

    ``size_bytes`` and ``modified_ns`` identify the version read; ``rows`` is
    the number of rows the run took from it, ``min_time``/``max_time`` their range.
    """

    path: str
    size_bytes: int
    modified_ns: int
    rows: int | None = None
    min_time: dt.datetime | None = None
    max_time: dt.datetime | None = None


def alert_key(monitor: str, segment: str, model: str, kind: str) -> str:
    """The stable key of an alert: sha256 (hex) of its four names as a JSON array."""
    text = json.dumps([monitor, segment, model, kind], ensure_ascii=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


RecordT = TypeVar("RecordT")


def coerce_records(record_type: type[RecordT], items: Iterable[Any], *,
                   argument: str) -> list[RecordT]:
    """Turn ``items`` (records or mappings) into ``record_type`` instances."""
    records: list[RecordT] = []
    for index, item in enumerate(items):
        if isinstance(item, record_type):
            records.append(item)
            continue
        if not isinstance(item, Mapping):
            raise StorageError(
                f"{argument}[{index}] is a {type(item).__name__}, not a "
                f"{record_type.__name__} or a mapping",
                where=f"argument {argument!r}",
                hint=f"pass {record_type.__name__}(...) objects or dicts with its fields")
        try:
            records.append(record_type(**item))
        except TypeError as error:
            fields = ", ".join(field.name for field in dataclasses.fields(record_type))  # type: ignore[arg-type]
            raise StorageError(
                f"{argument}[{index}] does not fit {record_type.__name__}: {error}",
                where=f"argument {argument!r}",
                hint=f"use exactly the fields {fields}") from error
    return records
