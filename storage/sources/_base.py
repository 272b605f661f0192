"""What every source shares: declared types, time windows and the ``Scan`` protocol.

Time conventions (all sources)
------------------------------
- A window is half-open on the time column: ``start <= time < end``; either
  bound may be ``None`` (open).  Bounds are timezone-aware ``datetime`` objects;
  they are converted to UTC.
- Time values stored without a zone (naive timestamps, SQL ``TIMESTAMP``
  without time zone, MariaDB ``DATETIME``) are taken to be UTC.
- Rows whose time is NULL belong to no window and are never delivered.
- The time column is delivered as ``timestamp[<unit>, tz=UTC]`` (a date
  column as ``timestamp[us, tz=UTC]`` at midnight).

Declared types
--------------
A source may declare ``{column: type name}``; the names are our own and
deliberately coarse, so that harmless writer differences (``int32`` against
``int64``) do not stop a night, while a real change (a number that became
text) does:

================  ==================================================
``"float"``       any floating-point type
``"integer"``     any signed or unsigned integer type
``"number"``      float, integer or decimal
``"string"``      text (``string``, ``large_string``, dictionary of text)
``"boolean"``     true/false
``"timestamp"``   any timestamp, with or without zone
``"date"``        a calendar date
``"decimal"``     a fixed-point decimal
================  ==================================================
"""

from __future__ import annotations

import abc
import dataclasses
import datetime as dt
from collections.abc import Callable, Iterator, Mapping, Sequence
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc

from monitor.errors import ConfigurationError, SourceError

__all__ = ["DECLARED_TYPES", "Scan", "SourceSummary", "declared_schema", "type_matches"]


def _is_text(data_type: pa.DataType) -> bool:
    if pa.types.is_dictionary(data_type):
        return _is_text(data_type.value_type)
    return bool(pa.types.is_string(data_type) or pa.types.is_large_string(data_type)
                or getattr(pa.types, "is_string_view", lambda _t: False)(data_type))


#: Declared type names and the Arrow types each accepts.
DECLARED_TYPES: dict[str, Callable[[pa.DataType], bool]] = {
    "float": pa.types.is_floating,
    "integer": pa.types.is_integer,
    "number": lambda t: bool(pa.types.is_floating(t) or pa.types.is_integer(t)
                             or pa.types.is_decimal(t)),
    "string": _is_text,
    "boolean": pa.types.is_boolean,
    "timestamp": pa.types.is_timestamp,
    "date": pa.types.is_date,
    "decimal": pa.types.is_decimal,
}

#: The Arrow type a value of each declared type is delivered as when the source
#: has to build the arrays itself (SQL).
DELIVERED_TYPES: dict[str, pa.DataType] = {
    "float": pa.float64(),
    "integer": pa.int64(),
    "number": pa.float64(),
    "string": pa.string(),
    "boolean": pa.bool_(),
    "timestamp": pa.timestamp("us", tz="UTC"),
    "date": pa.date32(),
    "decimal": pa.float64(),
}


def declared_schema(schema: Mapping[str, str] | None, *, where: str) -> dict[str, str]:
    """Check a declared schema ``{column: type name}`` and return it as a dict."""
    if schema is None:
        return {}
    if not isinstance(schema, Mapping):
        raise ConfigurationError(f"declared schema must be a mapping of column to type name, "
                                 f"got {type(schema).__name__}", where=where,
                                 hint=f"e.g. {{'units_sold': 'number'}}; types: "
                                      f"{', '.join(DECLARED_TYPES)}")
    checked: dict[str, str] = {}
    for column, type_name in schema.items():
        check_column_name(column, where=where)
        if type_name not in DECLARED_TYPES:
            raise ConfigurationError(
                f"column {column!r} is declared with unknown type {type_name!r}",
                where=where, hint=f"use one of {', '.join(DECLARED_TYPES)}")
        checked[column] = type_name
    return checked


def type_matches(type_name: str, data_type: pa.DataType) -> bool:
    """Whether an Arrow type is acceptable for a declared type name."""
    return bool(DECLARED_TYPES[type_name](data_type))


def check_column_name(column: Any, *, where: str) -> str:
    """A column name must be a non-empty string without NUL characters."""
    if not isinstance(column, str) or not column or "\x00" in column or len(column) > 255:
        raise ConfigurationError(f"invalid column name {column!r}", where=where,
                                 hint="column names are non-empty text of at most 255 "
                                      "characters without NUL")
    return column


def check_columns(columns: Sequence[str], *, where: str) -> tuple[str, ...]:
    """The requested columns: a non-empty sequence of distinct names."""
    if isinstance(columns, str) or not isinstance(columns, Sequence) or not columns:
        raise ConfigurationError(f"columns must be a non-empty list of names, got {columns!r}",
                                 where=where, hint="pass e.g. ['time', 'units_sold']")
    names = tuple(check_column_name(column, where=where) for column in columns)
    if len(set(names)) != len(names):
        raise ConfigurationError(f"columns {list(names)} name a column twice", where=where,
                                 hint="list each column once")
    return names


def window_bound(value: Any, *, name: str, where: str) -> dt.datetime | None:
    """A window bound as an aware UTC datetime (or None).  Anything else is refused."""
    if value is None:
        return None
    if not isinstance(value, dt.datetime):
        raise ConfigurationError(
            f"window bound {name} must be a datetime, got {type(value).__name__}",
            where=where, hint="pass a timezone-aware datetime (UTC), not text or a number")
    if value.tzinfo is None or value.utcoffset() is None:
        raise ConfigurationError(f"window bound {name} {value.isoformat()} has no time zone",
                                 where=where,
                                 hint="pass a timezone-aware datetime, e.g. tzinfo=UTC")
    return value.astimezone(dt.UTC)


def check_window(start: Any, end: Any, *, where: str) -> tuple[dt.datetime | None,
                                                               dt.datetime | None]:
    """Both bounds checked; ``start < end`` when both are given."""
    low = window_bound(start, name="start", where=where)
    high = window_bound(end, name="end", where=where)
    if low is not None and high is not None and not low < high:
        raise ConfigurationError(f"window start {low.isoformat()} is not before its end "
                                 f"{high.isoformat()}", where=where,
                                 hint="the window is half-open [start, end): start < end")
    return low, high


def utc_time_array(array: pa.Array | pa.ChunkedArray) -> pa.Array | pa.ChunkedArray:
    """The time column as ``timestamp[unit, tz=UTC]`` (naive values taken as UTC)."""
    data_type = array.type
    if pa.types.is_timestamp(data_type):
        if data_type.tz == "UTC":
            return array
        # same stored instants: a naive timestamp is read as UTC, an aware one is UTC inside
        return array.view(pa.timestamp(data_type.unit, tz="UTC"))
    if pa.types.is_date(data_type):
        return pc.cast(array, pa.timestamp("us", tz="UTC"))
    return array


def as_utc_datetime(value: Any) -> dt.datetime | None:
    """A statistic or scalar value (datetime, date, Arrow scalar) as aware UTC."""
    if isinstance(value, pa.Scalar):
        value = value.as_py()
    if value is None:
        return None
    if isinstance(value, dt.datetime):
        return value.replace(tzinfo=dt.UTC) if value.tzinfo is None else value.astimezone(dt.UTC)
    if isinstance(value, dt.date):
        return dt.datetime(value.year, value.month, value.day, tzinfo=dt.UTC)
    return None


@dataclasses.dataclass(frozen=True, slots=True)
class SourceSummary:
    """What ``source.check()`` found: enough to say the source is usable.

    ``columns`` maps each column to its type as the source sees it;
    ``files`` is the number of files (Parquet) or ``None`` (SQL).
    """

    source: str
    columns: Mapping[str, str]
    rows: int | None
    files: int | None
    min_time: dt.datetime | None
    max_time: dt.datetime | None


class _OrderTracker:
    """Checks batch after batch that the time column never goes backwards."""

    def __init__(self, *, check_order: bool = True) -> None:
        self.last: pa.Scalar | None = None
        self.check_order = check_order
        self.in_order = True
        self.min_time: dt.datetime | None = None
        self.max_time: dt.datetime | None = None

    def observe(self, times: pa.Array) -> tuple[dt.datetime | None, dt.datetime | None]:
        """Note a batch's time values; returns their (min, max) as aware UTC."""
        count = len(times)
        if count == 0:
            return None, None
        sorted_batch = False
        if self.check_order and self.in_order:
            sorted_batch = count == 1 or bool(pc.all(pc.less_equal(
                times.slice(0, count - 1), times.slice(1))).as_py())
            if not sorted_batch or (self.last is not None
                                    and pc.less(times[0], self.last).as_py()):
                self.in_order = False
        if sorted_batch:  # in order: the ends are the extremes, no second pass needed
            low, high = as_utc_datetime(times[0]), as_utc_datetime(times[count - 1])
        else:
            extremes = pc.min_max(times)
            low, high = as_utc_datetime(extremes["min"]), as_utc_datetime(extremes["max"])
        self.widen(low, high)
        self.last = times[count - 1]
        return low, high

    def widen(self, low: dt.datetime | None, high: dt.datetime | None) -> None:
        """Extend the observed time range."""
        if low is not None and (self.min_time is None or low < self.min_time):
            self.min_time = low
        if high is not None and (self.max_time is None or high > self.max_time):
            self.max_time = high


class Scan(abc.ABC):
    """A window of a source, readable any number of times.

    Iterating yields ``pyarrow.RecordBatch`` objects with exactly the requested
    columns, in that order, of at most ``batch_rows`` rows each.  Each iteration
    reads the source again (Parquet: unless the window was sorted in memory),
    so the statistics can make a second pass.

    Attributes (meaningful after a complete iteration)
    --------------------------------------------------
    rows
        Rows delivered by the last complete iteration (``None`` before one).
    in_time_order
        Whether the batches of the last complete iteration were in time order
        (before the first one: what is known from metadata).  Read it after the
        pass whose order matters; when False, order-dependent checks should be
        reported as not applicable.
    min_time, max_time
        Range of the time column over the delivered rows (``max_time`` is the
        watermark to record).
    files
        Files read (Parquet); empty for SQL.

    Raises
    ------
    SourceError
        If a later complete iteration delivers a different number of rows than
        the first (the data changed under the run).
    """

    def __init__(self, columns: tuple[str, ...], start: dt.datetime | None,
                 end: dt.datetime | None, *, time_column: str, where: str) -> None:
        self.columns = columns
        self.start = start
        self.end = end
        self.time_column = time_column
        self.where = where
        self.rows: int | None = None
        self.min_time: dt.datetime | None = None
        self.max_time: dt.datetime | None = None
        self.passes = 0
        self._in_time_order = True

    @property
    def in_time_order(self) -> bool:
        return self._in_time_order

    @property
    def files(self) -> tuple[str, ...]:
        return ()

    @abc.abstractmethod
    def _batches(self, tracker: _OrderTracker) -> Iterator[pa.RecordBatch]:
        """Yield the window's batches, feeding each batch's time values to ``tracker``."""

    def __iter__(self) -> Iterator[pa.RecordBatch]:
        tracker = _OrderTracker()
        rows = 0
        for batch in self._batches(tracker):
            rows += batch.num_rows
            yield batch
        if self.rows is not None and rows != self.rows:
            raise SourceError(
                f"the window delivered {rows} rows on pass {self.passes + 1} but {self.rows} "
                "on the first pass: the data changed while the run was reading it",
                where=self.where,
                hint="give the window an end bound in the past, or run when writers are done")
        self.rows = rows
        self.passes += 1
        self._in_time_order = tracker.in_order
        self.min_time, self.max_time = tracker.min_time, tracker.max_time
