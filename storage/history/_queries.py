"""Read the history back as pandas DataFrames (called through ``HistoryStore``).

Every frame has one row per stored row, instants as ``datetime64[ns, UTC]``,
floats as ``float64`` with NaN where the store holds NULL (non-finite values
are stored as NULL), and a time axis from the run: ``slot_at`` (the scheduled
instant) and the window bounds.  Time filters apply to ``slot_at`` and are
half-open: ``start <= slot_at < end``.  Only completed runs enter trends.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from typing import Any

import pandas as pd
import sqlalchemy as sa

from storage.history._schema import FiniteFloat, HistoryTables, UtcDateTime

__all__ = [
    "alert_events",
    "alerts",
    "annotations",
    "check_trend",
    "coefficient_paths",
    "metric_trend",
    "promotions",
    "runs",
    "verdict_history",
]


def _frame(connection: sa.Connection, statement: sa.Select[Any]) -> pd.DataFrame:
    result = connection.execute(statement)
    names = list(result.keys())
    frame = pd.DataFrame(result.all(), columns=names)
    for column in statement.selected_columns:
        name = column.name
        if isinstance(column.type, UtcDateTime):
            frame[name] = pd.to_datetime(frame[name], utc=True).astype("datetime64[ns, UTC]")
        elif isinstance(column.type, (FiniteFloat, sa.Double, sa.Float)):
            frame[name] = frame[name].astype("float64")
        elif isinstance(column.type, (sa.Integer, sa.BigInteger)):
            if frame[name].isna().any():
                frame[name] = frame[name].astype("Int64")
            else:
                frame[name] = frame[name].astype("int64")
        elif isinstance(column.type, sa.Boolean):
            frame[name] = frame[name].astype("boolean")
    return frame


def _window(statement: sa.Select[Any], column: sa.ColumnElement[Any],
            start: dt.datetime | None, end: dt.datetime | None) -> sa.Select[Any]:
    if start is not None:
        statement = statement.where(column >= start)
    if end is not None:
        statement = statement.where(column < end)
    return statement


def _run_axis(tables: HistoryTables) -> list[sa.ColumnElement[Any]]:
    runs = tables.runs
    return [runs.c.run_id, runs.c.monitor, runs.c.slot_at, runs.c.window_start,
            runs.c.window_end]


def runs(connection: sa.Connection, tables: HistoryTables, monitor: str | None, *,
         start: dt.datetime | None, end: dt.datetime | None,
         status: str | None) -> pd.DataFrame:
    """Runs, one row per finished attempt (completed or failed), by slot and attempt."""
    table = tables.runs
    statement = sa.select(*table.c).order_by(table.c.slot_at, table.c.attempt, table.c.run_id)
    if monitor is not None:
        statement = statement.where(table.c.monitor == monitor)
    if status is not None:
        statement = statement.where(table.c.status == status)
    return _frame(connection, _window(statement, table.c.slot_at, start, end))


def _results(connection: sa.Connection, tables: HistoryTables, table: sa.Table,
             columns: Sequence[sa.ColumnElement[Any]], monitor: str, *,
             filters: dict[str, str | None], start: dt.datetime | None,
             end: dt.datetime | None, order: Sequence[sa.ColumnElement[Any]]) -> pd.DataFrame:
    runs = tables.runs
    statement = (sa.select(*_run_axis(tables), *columns)
                 .select_from(table.join(runs, runs.c.run_id == table.c.run_id))
                 .where(runs.c.monitor == monitor, runs.c.status == "completed"))
    for name, value in filters.items():
        if value is not None:
            statement = statement.where(table.c[name] == value)
    statement = _window(statement, runs.c.slot_at, start, end)
    return _frame(connection, statement.order_by(runs.c.slot_at, runs.c.run_id, *order))


def metric_trend(connection: sa.Connection, tables: HistoryTables, monitor: str, metric: str,
                 *, model: str | None, segment: str | None, start: dt.datetime | None,
                 end: dt.datetime | None) -> pd.DataFrame:
    """Columns: run axis, ``segment``, ``model``, ``metric``, ``value``."""
    table = tables.metrics
    return _results(connection, tables, table,
                    [table.c.segment, table.c.model, table.c.metric, table.c.value], monitor,
                    filters={"metric": metric, "model": model, "segment": segment},
                    start=start, end=end, order=[table.c.segment, table.c.model])


def check_trend(connection: sa.Connection, tables: HistoryTables, monitor: str,
                check: str | None, *, model: str | None, segment: str | None,
                start: dt.datetime | None, end: dt.datetime | None,
                with_detail: bool = False) -> pd.DataFrame:
    """Columns: run axis, ``segment``, ``model``, ``check_name``, ``statistic``,
    ``p_value``, ``df``, ``df2``, ``verdict``, ``is_exact``, ``sample_size``, ``rows``
    (and ``detail``, the parsed JSON, when ``with_detail``).  ``check=None``: every check."""
    table = tables.checks
    names = ["segment", "model", "check_name", "statistic", "p_value", "df", "df2", "verdict",
             "is_exact", "sample_size", "rows"] + (["detail"] if with_detail else [])
    return _results(connection, tables, table, [table.c[name] for name in names], monitor,
                    filters={"check_name": check, "model": model, "segment": segment},
                    start=start, end=end,
                    order=[table.c.segment, table.c.model, table.c.check_name])


def coefficient_paths(connection: sa.Connection, tables: HistoryTables, monitor: str, *,
                      model: str | None, term: str | None, segment: str | None,
                      start: dt.datetime | None, end: dt.datetime | None) -> pd.DataFrame:
    """Columns: run axis, ``segment``, ``model``, ``term``, ``estimate``, ``std_error``,
    ``ci_lower``, ``ci_upper``, ``ci_level``, ``p_value``."""
    table = tables.coefficients
    columns = [table.c[name] for name in ("segment", "model", "term", "estimate", "std_error",
                                          "ci_lower", "ci_upper", "ci_level", "p_value")]
    return _results(connection, tables, table, columns, monitor,
                    filters={"model": model, "term": term, "segment": segment},
                    start=start, end=end,
                    order=[table.c.segment, table.c.model, table.c.term])


def verdict_history(connection: sa.Connection, tables: HistoryTables, monitor: str, *,
                    criterion: str | None, segment: str | None, start: dt.datetime | None,
                    end: dt.datetime | None, with_detail: bool = False) -> pd.DataFrame:
    """Columns: run axis, ``segment``, ``criterion``, ``best_model``, ``chosen_model``,
    ``is_chosen_best``, ``margin`` (``detail``, the parsed JSON, when ``with_detail``),
    and ``previous_best`` / ``changed``: the best model of the previous run (same
    segment and criterion, within the frame) and whether it differs (False on the
    first row of each group)."""
    table = tables.verdicts
    names = ["segment", "criterion", "best_model", "chosen_model", "is_chosen_best",
             "margin"] + (["detail"] if with_detail else [])
    columns = [table.c[name] for name in names]
    frame = _results(connection, tables, table, columns, monitor,
                     filters={"criterion": criterion, "segment": segment},
                     start=start, end=end, order=[table.c.segment, table.c.criterion])
    previous = frame.groupby(["segment", "criterion"], sort=False)["best_model"].shift(1)
    frame["previous_best"] = previous
    frame["changed"] = (previous.notna() & (previous != frame["best_model"])).astype(bool)
    return frame


def alerts(connection: sa.Connection, tables: HistoryTables, monitor: str | None, *,
           state: str | Sequence[str] | None, model: str | None, start: dt.datetime | None,
           end: dt.datetime | None) -> pd.DataFrame:
    """Alerts, one row per key with its current state; time filters on ``updated_at``."""
    table = tables.alerts
    statement = sa.select(*table.c).order_by(table.c.opened_at, table.c.alert_id)
    if monitor is not None:
        statement = statement.where(table.c.monitor == monitor)
    if model is not None:
        statement = statement.where(table.c.model == model)
    if state is not None:
        states = [state] if isinstance(state, str) else list(state)
        statement = statement.where(table.c.state.in_(states))
    return _frame(connection, _window(statement, table.c.updated_at, start, end))


def alert_events(connection: sa.Connection, tables: HistoryTables, monitor: str | None, *,
                 model: str | None, start: dt.datetime | None,
                 end: dt.datetime | None) -> pd.DataFrame:
    """Each sighting and change of an alert, with the alert's names; filters on ``at``."""
    events, table = tables.alert_events, tables.alerts
    statement = (sa.select(events.c.event_id, events.c.alert_id, table.c.monitor,
                           table.c.segment, table.c.model, table.c.kind, events.c.run_id,
                           events.c.at, events.c.state, events.c.severity, events.c.actor,
                           events.c.message)
                 .select_from(events.join(table, table.c.alert_id == events.c.alert_id))
                 .order_by(events.c.at, events.c.event_id))
    if monitor is not None:
        statement = statement.where(table.c.monitor == monitor)
    if model is not None:
        statement = statement.where(table.c.model == model)
    return _frame(connection, _window(statement, events.c.at, start, end))


def annotations(connection: sa.Connection, tables: HistoryTables, monitor: str, *,
                start: dt.datetime | None, end: dt.datetime | None) -> pd.DataFrame:
    """Annotations overlapping ``[start, end)``, by start."""
    table = tables.annotations
    statement = (sa.select(*table.c).where(table.c.monitor == monitor)
                 .order_by(table.c.starts_at, table.c.annotation_id))
    if start is not None:
        statement = statement.where(table.c.ends_at > start)
    if end is not None:
        statement = statement.where(table.c.starts_at < end)
    return _frame(connection, statement)


def promotions(connection: sa.Connection, tables: HistoryTables, monitor: str) -> pd.DataFrame:
    """Promotions of a monitor, oldest first."""
    table = tables.promotions
    return _frame(connection, sa.select(*table.c).where(table.c.monitor == monitor)
                  .order_by(table.c.promoted_at, table.c.promotion_id))
