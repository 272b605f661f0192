"""SQL source: a table or a user's SELECT, streamed into Arrow record batches.

- Any SQLAlchemy URL; the URL (with its password) comes from the caller or an
  environment variable and is never shown: messages carry it redacted.
- Window bounds are always bound parameters; identifiers (table, schema,
  columns) are validated and quoted by SQLAlchemy, never pasted into SQL.
- Rows come through a server-side cursor (``yield_per``), ordered by the time
  column, ``batch_rows`` at a time: memory does not grow with the table.
- Connections made here run in UTC (PostgreSQL ``TimeZone``, MariaDB/MySQL
  ``time_zone``), so zone-less time columns are compared and read as UTC.
"""

from __future__ import annotations

import datetime as dt
import decimal
from collections.abc import Callable, Iterator, Mapping, Sequence
from typing import Any

import pyarrow as pa
import sqlalchemy as sa

from monitor.errors import ConfigurationError, DataValidationError, SourceError
from storage._urls import redact, resolve_url, safe_url
from storage.sources._base import (
    DELIVERED_TYPES,
    Scan,
    SourceSummary,
    _OrderTracker,
    check_column_name,
    check_columns,
    check_window,
    declared_schema,
    utc_time_array,
)

__all__ = ["SqlScan", "SqlSource"]

_UTC_TIME = pa.timestamp("us", tz="UTC")

#: Declared type names each SQLAlchemy type family satisfies.
_SQL_FAMILIES: tuple[tuple[type[sa.types.TypeEngine[Any]], frozenset[str]], ...] = (
    (sa.Boolean, frozenset({"boolean"})),
    (sa.Integer, frozenset({"integer", "number"})),
    (sa.Float, frozenset({"float", "number"})),
    (sa.Numeric, frozenset({"decimal", "number", "float"})),
    (sa.DateTime, frozenset({"timestamp"})),
    (sa.Date, frozenset({"date"})),
    (sa.String, frozenset({"string"})),
)


def _accepted_names(sql_type: sa.types.TypeEngine[Any]) -> frozenset[str] | None:
    for family, names in _SQL_FAMILIES:
        if isinstance(sql_type, family):
            return names
    return None


def _delivered_type(sql_type: sa.types.TypeEngine[Any] | None) -> pa.DataType | None:
    if sql_type is None:
        return None
    if isinstance(sql_type, sa.Boolean):
        return pa.bool_()
    if isinstance(sql_type, sa.Integer):
        return pa.int64()
    if isinstance(sql_type, (sa.Float, sa.Numeric)):
        return pa.float64()
    if isinstance(sql_type, sa.DateTime):
        return _UTC_TIME
    if isinstance(sql_type, sa.Date):
        return pa.date32()
    if isinstance(sql_type, sa.String):
        return pa.string()
    return None


def _to_float(value: Any) -> Any:
    return float(value) if isinstance(value, decimal.Decimal) else value


class SqlSource:
    """Rows of a SQL table or query, by time window.

    Parameters
    ----------
    url, url_env
        The database URL, or the name of the environment variable holding it
        (give exactly one; use ``url_env`` when the URL carries a password).
    table, db_schema
        A table (and optionally its database schema) to read; names are quoted,
        so spaces, quotes, unicode and reserved words are fine.
    query
        Instead of a table: a SELECT whose result has the time column and the
        requested columns.  It is wrapped as a subquery; the window is added as
        bound parameters.  It is trusted configuration (written by the monitor's
        owner), not user input.
    time_column
        The column that places each row in time.
    schema
        Declared types ``{column: type name}`` (see ``storage.sources._base``).
    batch_rows
        Rows per record batch (and per fetch from the server-side cursor).
    name
        A short name for messages (default: the table or "query").
    engine
        An existing engine to use instead of ``url`` (its session time zone is
        then the caller's business: it should be UTC).
    """

    def __init__(self, url: str | None = None, *, url_env: str | None = None,
                 table: str | None = None, query: str | None = None,
                 db_schema: str | None = None, time_column: str,
                 schema: Mapping[str, str] | None = None, batch_rows: int = 50_000,
                 name: str | None = None, engine: sa.Engine | None = None) -> None:
        self.url = url
        self.url_env = url_env
        self.table = table
        self.query = query
        self.db_schema = db_schema
        self.time_column = time_column
        self.schema = schema
        self.batch_rows = batch_rows
        self.name = name
        self._engine = engine
        self._resolved_url: str | None = str(engine.url) if engine is not None else None

    # ------------------------------------------------------------------ set-up

    @property
    def where(self) -> str:
        label = self.name or (f"table {self.table!r}" if self.table else "query")
        location = safe_url(self._resolved_url) if self._resolved_url else ""
        return f"SQL source {label}" + (f" on {location}" if location else "")

    def _validate(self) -> dict[str, str]:
        if (self.table is None) == (self.query is None):
            raise ConfigurationError("a SQL source needs exactly one of table or query",
                                     where=self.where,
                                     hint="name a table, or give a SELECT as query")
        if self.table is not None:
            check_column_name(self.table, where=self.where)
        if self.db_schema is not None:
            check_column_name(self.db_schema, where=self.where)
        if self.query is not None and (not isinstance(self.query, str)
                                       or not self.query.strip()):
            raise ConfigurationError("query must be a non-empty SELECT", where=self.where,
                                     hint="e.g. SELECT * FROM sales WHERE region = 'north'")
        check_column_name(self.time_column, where=self.where)
        if not isinstance(self.batch_rows, int) or self.batch_rows < 1:
            raise ConfigurationError(f"batch_rows must be a positive integer, got "
                                     f"{self.batch_rows!r}", where=self.where,
                                     hint="e.g. 50000")
        return declared_schema(self.schema, where=self.where)

    @property
    def engine(self) -> sa.Engine:
        """The engine (created on first use, in UTC)."""
        if self._engine is None:
            url = resolve_url(self.url, self.url_env, what=self.where)
            self._resolved_url = url
            backend = sa.engine.make_url(url).get_backend_name()
            connect_args: dict[str, Any] = {}
            if backend == "postgresql":
                connect_args["options"] = "-c TimeZone=UTC"
            elif backend in ("mysql", "mariadb"):
                connect_args["init_command"] = "SET time_zone = '+00:00'"
            self._engine = sa.create_engine(url, pool_pre_ping=True, connect_args=connect_args)
        return self._engine

    def close(self) -> None:
        """Release the engine's connections."""
        if self._engine is not None:
            self._engine.dispose()

    def _error(self, action: str, error: BaseException) -> SourceError:
        original = getattr(error, "orig", None) or error
        lines = str(original).strip().splitlines()
        text = f"{action} failed: {type(original).__name__}: {lines[0] if lines else ''}"
        return SourceError(redact(text, self._resolved_url or ""), where=self.where,
                           hint="check the URL, that the server is up, the table or query, "
                                "and the user's rights")

    def _relation(self, connection: sa.Connection, needed: Sequence[str],
                  declared: Mapping[str, str]) -> tuple[sa.FromClause, dict[str, Any]]:
        """The table or wrapped query, and the SQL type of each column (None if unknown)."""
        if self.table is not None:
            try:
                table = sa.Table(self.table, sa.MetaData(), schema=self.db_schema,
                                 autoload_with=connection)
            except sa.exc.NoSuchTableError as error:
                raise SourceError(
                    f"table {self.table!r} does not exist"
                    + (f" in schema {self.db_schema!r}" if self.db_schema else ""),
                    where=self.where, hint="check the table name (it is case-sensitive as "
                                           "written) and the schema") from error
            names = list(table.c.keys())
            for column in dict.fromkeys([*needed, *declared]):
                if column not in names:
                    raise DataValidationError(
                        f"column {column!r} is missing from table {self.table!r} (it has "
                        f"{', '.join(map(repr, names))})",
                        where=f"{self.where}, column {column!r}",
                        hint="fix the column name in the monitor, or the table",
                        column=column)
            types = {name: table.c[name].type for name in names}
            for column, type_name in declared.items():
                accepted = _accepted_names(types[column])
                if accepted is not None and type_name not in accepted:
                    raise DataValidationError(
                        f"column {column!r} of table {self.table!r} has SQL type "
                        f"{types[column]!r}, declared {type_name!r}",
                        where=f"{self.where}, column {column!r}",
                        hint="change the declared type if the change is meant",
                        column=column)
            return table, types
        text = self.query.strip().rstrip(";") if self.query else ""
        probe = sa.text(text).columns().subquery("regwarden_probe")
        result = connection.execute(sa.select(sa.text("*")).select_from(probe)
                                    .where(sa.false()))
        names = list(result.keys())
        result.close()
        for column in dict.fromkeys([*needed, *declared]):
            if column not in names:
                raise DataValidationError(
                    f"column {column!r} is missing from the query's result (it has "
                    f"{', '.join(map(repr, names))})",
                    where=f"{self.where}, column {column!r}",
                    hint="select the column in the query, or fix its name in the monitor",
                    column=column)
        subquery = sa.text(text).columns(*[sa.column(name) for name in names]).subquery(
            "regwarden_window")
        return subquery, {name: None for name in names}

    def _statement(self, relation: sa.FromClause, columns: Sequence[str],
                   start: dt.datetime | None, end: dt.datetime | None,
                   aware: bool) -> sa.Select[Any]:
        time = relation.c[self.time_column]
        selected = list(dict.fromkeys([*columns, self.time_column]))
        statement = sa.select(*[relation.c[name] for name in selected]).where(time.is_not(None))
        bound_type = sa.DateTime(timezone=aware)

        def bound(value: dt.datetime, name: str) -> sa.BindParameter[dt.datetime]:
            return sa.bindparam(name, value if aware else value.replace(tzinfo=None),
                                type_=bound_type)

        if start is not None:
            statement = statement.where(time >= bound(start, "regwarden_window_start"))
        if end is not None:
            statement = statement.where(time < bound(end, "regwarden_window_end"))
        return statement.order_by(time)

    # ------------------------------------------------------------------ public API

    def scan(self, columns: Sequence[str], start: dt.datetime | None = None,
             end: dt.datetime | None = None) -> SqlScan:
        """The rows of ``[start, end)`` with only ``columns``, ordered by time.

        Each iteration of the returned scan runs the query again.

        Raises
        ------
        ConfigurationError
            Bad arguments (a window bound that is not an aware datetime, ...).
        SourceError
            Unreachable database, missing table, failing query.
        DataValidationError
            A missing column or a declared type that does not match.
        """
        declared = self._validate()
        names = check_columns(columns, where=self.where)
        low, high = check_window(start, end, where=self.where)
        try:
            with self.engine.connect() as connection:
                relation, types = self._relation(connection,
                                                 [*names, self.time_column], declared)
                # PostgreSQL sessions made here are in UTC, so aware bounds compare right with
                # both TIMESTAMP kinds; elsewhere zone-less columns get naive UTC bounds
                aware = connection.dialect.name == "postgresql"
        except sa.exc.SQLAlchemyError as error:
            raise self._error("preparing the scan", error) from error
        statement = self._statement(relation, names, low, high, aware)
        return SqlScan(self, names, low, high, statement, declared, types)

    def check(self) -> SourceSummary:
        """Connect, find the table or run the query for zero rows, check declared columns."""
        declared = self._validate()
        try:
            with self.engine.connect() as connection:
                _, types = self._relation(connection, [self.time_column], declared)
        except sa.exc.SQLAlchemyError as error:
            raise self._error("checking the source", error) from error
        return SourceSummary(self.where, {name: (repr(kind) if kind is not None else "unknown")
                                          for name, kind in types.items()},
                             None, None, None, None)

    def max_time(self) -> dt.datetime | None:
        """Latest time value in the table or query (one aggregate query)."""
        declared = self._validate()
        try:
            with self.engine.connect() as connection:
                relation, _ = self._relation(connection, [self.time_column], declared)
                value = connection.execute(
                    sa.select(sa.func.max(relation.c[self.time_column]))).scalar()
        except sa.exc.SQLAlchemyError as error:
            raise self._error("reading the latest time", error) from error
        if value is None:
            return None
        times = utc_time_array(_time_array([value], self.where, self.time_column))
        result = times[0].as_py()
        assert isinstance(result, dt.datetime)
        return result


def _time_array(values: Sequence[Any], where: str, column: str) -> pa.Array:
    """Time values (naive = UTC, aware, or ISO text from SQLite) as timestamp[us, UTC]."""
    try:
        return pa.array(values, type=_UTC_TIME)
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        pass
    try:
        return pa.array(values).cast(pa.timestamp("us")).view(_UTC_TIME)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError) as error:
        raise DataValidationError(
            f"time column {column!r} holds values that are not timestamps "
            f"(first: {values[0]!r})", where=f"{where}, column {column!r}",
            hint="name a timestamp column as the time column", column=column) from error


class SqlScan(Scan):
    """A window of a :class:`SqlSource` (see :class:`storage.sources.Scan`).

    ``statement`` is the SELECT that runs on every iteration (its window
    bounds are bound parameters, visible in ``statement.compile().params``).
    """

    def __init__(self, source: SqlSource, columns: tuple[str, ...], start: dt.datetime | None,
                 end: dt.datetime | None, statement: sa.Select[Any],
                 declared: Mapping[str, str], types: Mapping[str, Any]) -> None:
        super().__init__(columns, start, end, time_column=source.time_column,
                         where=source.where)
        self._source = source
        self.statement = statement
        self._selected = list(dict.fromkeys([*columns, source.time_column]))
        self._types: dict[str, pa.DataType | None] = {}
        for name in self._selected:
            if name in declared:
                self._types[name] = DELIVERED_TYPES[declared[name]]
            else:
                self._types[name] = _delivered_type(types.get(name))
        self._declared = dict(declared)

    def _array(self, name: str, values: Sequence[Any]) -> pa.Array:
        if name == self.time_column:
            return _time_array(values, self.where, name)
        target = self._types[name]
        try:
            if target is not None and pa.types.is_floating(target):
                return pa.array([_to_float(value) for value in values], type=target)
            if target is not None and pa.types.is_timestamp(target):
                return _time_array(values, self.where, name)
            array = pa.array(values, type=target)
        except (pa.ArrowInvalid, pa.ArrowTypeError, OverflowError) as error:
            declared = self._declared.get(name)
            raise DataValidationError(
                f"column {name!r} holds a value that is not "
                f"{declared or str(target)}: {_describe(error)}",
                where=f"{self.where}, column {name!r}",
                hint="fix the data or the declared type", column=name) from error
        if target is None and not pa.types.is_null(array.type):
            self._types[name] = array.type  # query mode: later batches must match the first
        return array

    def _batches(self, tracker: _OrderTracker) -> Iterator[pa.RecordBatch]:
        source = self._source
        convert: Callable[[str, Sequence[Any]], pa.Array] = self._array
        try:
            with source.engine.connect() as connection:
                result = connection.execution_options(yield_per=source.batch_rows).execute(
                    self.statement)
                for rows in result.partitions(source.batch_rows):
                    columns = list(zip(*rows, strict=True))
                    arrays = {name: convert(name, columns[index])
                              for index, name in enumerate(self._selected)}
                    tracker.observe(arrays[self.time_column])
                    yield pa.RecordBatch.from_arrays([arrays[name] for name in self.columns],
                                                     names=list(self.columns))
        except sa.exc.SQLAlchemyError as error:
            raise source._error("reading the window", error) from error


def _describe(error: BaseException) -> str:
    lines = str(error).strip().splitlines()
    return lines[0] if lines else type(error).__name__
