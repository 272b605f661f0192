"""Terminal views of a monitor's history: plain rows built from the store's queries.

Each function takes a :class:`storage.history.HistoryStore` and a monitor name
and returns a :class:`View`: a title, column names and rows of plain values
(``str``, ``int``, ``float``, ``bool``, aware ``datetime`` or ``None``).  The
views add no statistics of their own: every number is a value the nightly run
stored, looked up and laid out (the criterion gap is the chosen model's stored
``delta`` metric).  :func:`view_to_csv` and :func:`view_to_json` serialise a
view; the command line lays it out as a table.

The time axis is the run's scheduled instant (``slot_at``), shown as ``night``;
time filters are half-open, ``start <= night < end``.  Only completed runs
appear in trends (failed nights are listed by :func:`nights`).
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

__all__ = [
    "View",
    "alerts_view",
    "check_outcomes",
    "coefficient_paths",
    "metric_trend",
    "nights",
    "notes",
    "verdict_timeline",
    "view_to_csv",
    "view_to_json",
]


@dataclass(frozen=True, slots=True)
class View:
    """One terminal view: ``rows`` are tuples in the order of ``columns``."""

    name: str
    title: str
    columns: tuple[str, ...]
    rows: tuple[tuple[Any, ...], ...]
    notes: tuple[str, ...] = field(default=())

    def records(self) -> list[dict[str, Any]]:
        """The rows as dicts keyed by column name."""
        return [dict(zip(self.columns, row, strict=True)) for row in self.rows]


# ---------------------------------------------------------------------------- conversion


def plain_value(value: Any) -> Any:
    """A builtin value: pandas/NumPy scalars unwrapped, NaN/NA -> None, Timestamps -> datetime."""
    if value is None or value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, pd.Timestamp):
        return value.to_pydatetime()
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        value = value.item()
    if isinstance(value, float) and math.isnan(value):
        return None
    return value


def _column(frame: pd.DataFrame, name: str) -> list[Any]:
    return [plain_value(value) for value in frame[name].tolist()]


def _instant_text(value: dt.datetime) -> str:
    return value.astimezone(dt.UTC).isoformat().replace("+00:00", "Z")


def json_value(value: Any) -> Any:
    """``value`` as strict JSON data (instants as ISO 8601 UTC with ``Z``, NaN/inf as None)."""
    value = plain_value(value)
    if isinstance(value, dt.datetime):
        return _instant_text(value)
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, Mapping):
        return {str(k): json_value(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_value(v) for v in value]
    return value


def view_to_json(view: View) -> dict[str, Any]:
    """``{"view", "title", "columns", "rows": [{column: value}], "notes"}``.

    Instants are ISO 8601 strings in UTC (``Z``); missing numbers are null.
    """
    return {"view": view.name, "title": view.title, "columns": list(view.columns),
            "rows": [{k: json_value(v) for k, v in record.items()}
                     for record in view.records()],
            "notes": list(view.notes)}


def view_to_csv(view: View) -> str:
    """CSV with a header line; numbers at full precision, instants in ISO 8601 UTC, blanks for
    missing values, nested values (evidence) as JSON."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(view.columns)
    for row in view.rows:
        cells = []
        for value in row:
            value = json_value(value)
            if value is None:
                cells.append("")
            elif isinstance(value, float):
                cells.append(repr(value))
            elif isinstance(value, (dict, list)):
                cells.append(json.dumps(value, ensure_ascii=False, allow_nan=False))
            else:
                cells.append(value)
        writer.writerow(cells)
    return buffer.getvalue()


# ---------------------------------------------------------------------------- views


def verdict_timeline(store: Any, monitor: str, *, segment: str | None = None,
                     start: dt.datetime | None = None,
                     end: dt.datetime | None = None) -> View:
    """Night by night: which candidate was best, the chosen one, and the gap between them.

    ``gap`` is the chosen model's criterion minus the best one's (its stored
    ``delta`` metric; 0 when the chosen model is the best).  On a night where the
    best candidate changed, ``best_before`` names the previous best and
    ``best_before_behind_by`` is that model's ``delta`` on the night: how far the
    new best got ahead of it.
    """
    verdicts = store.verdict_history(monitor, segment=segment, start=start, end=end)
    deltas = store.metric_trend(monitor, "delta", segment=segment, start=start, end=end)
    lookup = {(int(r.run_id), r.segment, r.model): plain_value(r.value)
              for r in deltas.itertuples(index=False)}
    rows = []
    for record in verdicts.itertuples(index=False):
        run_id = int(record.run_id)
        chosen, best = plain_value(record.chosen_model), plain_value(record.best_model)
        previous = plain_value(record.previous_best) if bool(record.changed) else None
        rows.append((
            plain_value(record.slot_at), record.segment, record.criterion, best, chosen,
            plain_value(record.is_chosen_best),
            lookup.get((run_id, record.segment, chosen)) if chosen is not None else None,
            previous,
            lookup.get((run_id, record.segment, previous)) if previous is not None else None,
            run_id,
        ))
    changes = sum(1 for row in rows if row[7] is not None)
    notes = (f"{len(rows)} night(s); the best candidate changed {changes} time(s).",
             "gap = chosen model's criterion minus the best candidate's (0 when the chosen "
             "model is the best).")
    return View("verdicts", "Which candidate led, night by night",
                ("night", "segment", "criterion", "best", "chosen", "chosen_is_best", "gap",
                 "best_before", "best_before_behind_by", "run_id"), tuple(rows), notes)


def metric_trend(store: Any, monitor: str, metric: str, *, model: str | None = None,
                 segment: str | None = None, start: dt.datetime | None = None,
                 end: dt.datetime | None = None) -> View:
    """One stored metric per night, one column per candidate model."""
    frame = store.metric_trend(monitor, metric, model=model, segment=segment, start=start,
                               end=end)
    models = sorted(set(frame["model"])) if len(frame) else ([model] if model else [])
    grouped: dict[tuple[int, str], dict[str, Any]] = {}
    axis: dict[tuple[int, str], Any] = {}
    for record in frame.itertuples(index=False):
        key = (int(record.run_id), record.segment)
        axis[key] = plain_value(record.slot_at)
        grouped.setdefault(key, {})[record.model] = plain_value(record.value)
    rows = tuple((axis[key], key[1], *(grouped[key].get(name) for name in models), key[0])
                 for key in axis)
    return View("metrics", f"{metric} night by night, per candidate",
                ("night", "segment", *models, "run_id"), rows,
                (f"metric {metric!r}; {len(rows)} night(s), {len(models)} candidate(s).",))


def check_outcomes(store: Any, monitor: str, *, check: str | None = None,
                   model: str | None = None, segment: str | None = None,
                   start: dt.datetime | None = None, end: dt.datetime | None = None) -> View:
    """Each check's verdict, statistic and p-value per night and model."""
    frame = store.check_trend(monitor, check, model=model, segment=segment, start=start,
                              end=end)
    rows = tuple(zip(_column(frame, "slot_at"), _column(frame, "segment"),
                     _column(frame, "model"), _column(frame, "check_name"),
                     _column(frame, "verdict"), _column(frame, "statistic"),
                     _column(frame, "p_value"), _column(frame, "rows"),
                     _column(frame, "is_exact"), _column(frame, "run_id"), strict=True))
    counts: dict[str, int] = {}
    for row in rows:
        counts[row[4]] = counts.get(row[4], 0) + 1
    summary = ", ".join(f"{counts[v]} {v}" for v in sorted(counts)) or "no check rows"
    return View("checks", "Check outcomes, night by night",
                ("night", "segment", "model", "check", "verdict", "statistic", "p_value",
                 "rows", "exact", "run_id"), rows, (summary + ".",))


def coefficient_paths(store: Any, monitor: str, *, model: str | None = None,
                      term: str | None = None, segment: str | None = None,
                      start: dt.datetime | None = None, end: dt.datetime | None = None) -> View:
    """Each coefficient's estimate, standard error and confidence bounds per night."""
    frame = store.coefficient_paths(monitor, model=model, term=term, segment=segment,
                                    start=start, end=end)
    names = ("slot_at", "segment", "model", "term", "estimate", "std_error", "ci_lower",
             "ci_upper", "ci_level", "run_id")
    rows = tuple(zip(*(_column(frame, name) for name in names), strict=True)) if len(frame) \
        else ()
    return View("coefficients", "Coefficient paths", ("night", *names[1:]), rows,
                (f"{len(rows)} row(s).",))


def notes(store: Any, monitor: str, *, start: dt.datetime | None = None,
          end: dt.datetime | None = None) -> View:
    """Promotions (which model was made the chosen one) and annotations, in time order."""
    promotions = store.promotions(monitor)
    annotations = store.annotations(monitor, start=start, end=end)
    rows: list[tuple[Any, ...]] = []
    for record in promotions.itertuples(index=False):
        at = plain_value(record.promoted_at)
        if (start is not None and at < start) or (end is not None and at >= end):
            continue
        previous = plain_value(record.previous_model)
        what = f"{record.model} made the chosen model" + (
            f" (was {previous})" if previous else "")
        rows.append((at, None, "promotion", record.segment, what, record.reason,
                     record.promoted_by, None))
    for record in annotations.itertuples(index=False):
        rows.append((plain_value(record.starts_at), plain_value(record.ends_at), "note",
                     plain_value(record.segment), record.note, None, record.created_by,
                     plain_value(record.silences_alerts)))
    rows.sort(key=lambda row: row[0])
    return View("notes", "Promotions and notes",
                ("at", "until", "kind", "segment", "what", "reason", "by", "silences_alerts"),
                tuple(rows), (f"{len(rows)} entr{'y' if len(rows) == 1 else 'ies'}.",))


def alerts_view(store: Any, monitor: str, *, state: str | Sequence[str] | None = None,
                model: str | None = None, segment: str | None = None,
                start: dt.datetime | None = None, end: dt.datetime | None = None) -> View:
    """Alerts with their current state, first and latest night seen, and evidence."""
    frame = store.alerts(monitor, state=state, model=model, start=start, end=end)
    if segment is not None and len(frame):
        frame = frame[frame["segment"] == segment]
    night_of = nights_by_run(store, monitor)
    rows = []
    for record in frame.itertuples(index=False):
        first = plain_value(record.first_seen_run_id)
        last = plain_value(record.last_seen_run_id)
        rows.append((int(record.alert_id), record.state, record.severity, record.kind,
                     record.segment, record.model, night_of.get(first),
                     night_of.get(last), record.message, plain_value(record.evidence)))
    open_count = sum(1 for row in rows if row[1] == "open")
    return View("alerts", "Alerts",
                ("alert_id", "state", "severity", "kind", "segment", "model", "first_night",
                 "latest_night", "message", "evidence"), tuple(rows),
                (f"{len(rows)} alert(s), {open_count} open. An alert is statistical evidence, "
                 "not proof: people who know the data decide what to do.",))


def nights(store: Any, monitor: str, *, start: dt.datetime | None = None,
           end: dt.datetime | None = None) -> View:
    """Every finished attempt: completed or failed, with rows read and the failure reason."""
    frame = store.runs(monitor, start=start, end=end)
    rows = []
    for record in frame.itertuples(index=False):
        reason = plain_value(record.error_message)
        step = plain_value(record.error_step)
        rows.append((plain_value(record.slot_at), int(record.attempt), record.status,
                     plain_value(record.window_start), plain_value(record.window_end),
                     plain_value(record.rows_read), plain_value(record.rows_dropped),
                     f"{step}: {reason}" if reason else None, int(record.run_id)))
    failed = sum(1 for row in rows if row[2] == "failed")
    return View("nights", "Nights run",
                ("night", "attempt", "status", "window_start", "window_end", "rows_read",
                 "rows_dropped", "failure", "run_id"), tuple(rows),
                (f"{len(rows)} attempt(s), {failed} failed.",))


def nights_by_run(store: Any, monitor: str) -> dict[int, dt.datetime]:
    """``run_id -> night`` for every run of the monitor (completed or failed)."""
    frame = store.runs(monitor)
    return {int(run_id): plain_value(slot) for run_id, slot in
            zip(frame["run_id"].tolist(), frame["slot_at"].tolist(), strict=True)}


def segments_of(frames: Iterable[pd.DataFrame]) -> list[str]:
    """The segment values present in some frames, sorted."""
    found: set[str] = set()
    for frame in frames:
        if len(frame) and "segment" in frame:
            found.update(str(value) for value in frame["segment"].dropna())
    return sorted(found)
