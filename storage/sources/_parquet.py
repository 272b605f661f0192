"""Parquet source: a file, a folder or a Hive-partitioned dataset, read through pyarrow.

How a window is read
--------------------
1. The files are listed (pyarrow datasets; names starting with ``.`` or ``_``
   are ignored, so writers can write to a hidden name and rename).
2. If ``time_partition`` names a partition key holding dates (``day=2024-05-01``),
   files in partitions outside the window are pruned without being opened.
3. Each remaining file's footer is read: its columns are checked against the
   declared schema (or, without one, against the first file's types), and its
   row groups' time statistics drop files wholly outside the window.
4. Files are read one by one in order of their earliest time, only the
   requested columns, with the window pushed down as a filter (row groups are
   skipped by their statistics).  Every error names the file.

Time order: when files or row groups overlap in time (or a row group is found
out of order while reading), the window is sorted in memory if its estimated
size fits ``memory_budget_bytes``; otherwise it is delivered as stored and
``scan.in_time_order`` is False.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import os
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds

from monitor.errors import ConfigurationError, DataValidationError, SourceError
from storage.history._records import SourceFile
from storage.sources._base import (
    Scan,
    SourceSummary,
    _OrderTracker,
    as_utc_datetime,
    check_column_name,
    check_columns,
    check_window,
    declared_schema,
    type_matches,
    utc_time_array,
)

__all__ = ["ParquetScan", "ParquetSource"]

#: Sorting needs the window and a sorted copy: the estimate is doubled.
_SORT_OVERHEAD = 2.0


@dataclasses.dataclass(slots=True)
class _FilePlan:
    fragment: ds.ParquetFileFragment
    path: str
    size_bytes: int
    modified_ns: int
    min_time: dt.datetime | None
    max_time: dt.datetime | None
    row_groups_in_order: bool
    estimated_bytes: int


def _describe_arrow_error(error: BaseException) -> str:
    text = str(error).strip().splitlines()
    return f"{type(error).__name__}: {text[0] if text else ''}"


def _partition_end(first: dt.datetime, partition_format: str) -> dt.datetime:
    """End (excluded) of the span a partition value covers: the next day, month or year,
    after the finest calendar unit in its format (``%Y-%m`` covers a whole month)."""
    if any(code in partition_format for code in ("%d", "%j")):
        return first + dt.timedelta(days=1)
    if any(code in partition_format for code in ("%m", "%b", "%B")):
        year, month = (first.year + 1, 1) if first.month == 12 else (first.year, first.month + 1)
        return first.replace(year=year, month=month, day=1)
    return first.replace(year=first.year + 1, month=1, day=1)


class ParquetSource:
    """Rows of a Parquet file, folder or Hive-partitioned dataset.

    Parameters
    ----------
    path
        A ``.parquet`` file or a folder (read recursively).
    time_column
        The column that places each row in time (timestamp or date).
    schema
        Declared types ``{column: type name}`` (see ``storage.sources._base``).
        A file with a declared column missing or of another type stops the
        scan with an error naming the file and the column.
    batch_rows
        Largest number of rows per delivered batch.
    memory_budget_bytes
        Largest window (estimated from the files' metadata, doubled for the
        sort) that is sorted in memory when the files are not in time order.
    partitioning
        ``"hive"`` (``key=value`` folders) or ``None`` (no partition keys).
    time_partition
        Name of a partition key holding the date of its rows (e.g. ``"day"``);
        partitions outside the window are pruned without opening their files.
        The key's values are parsed with ``time_partition_format``; a partition
        covers the day, month or year after the finest unit of that format
        (``"%Y-%m"``: a whole month).
    name
        A short name for messages (default: the path).
    """

    def __init__(self, path: str | os.PathLike[str], *, time_column: str,
                 schema: Mapping[str, str] | None = None, batch_rows: int = 65_536,
                 memory_budget_bytes: int = 512 * 2**20, partitioning: str | None = "hive",
                 time_partition: str | None = None, time_partition_format: str = "%Y-%m-%d",
                 name: str | None = None) -> None:
        self.path = path
        self.time_column = time_column
        self.schema = schema
        self.batch_rows = batch_rows
        self.memory_budget_bytes = memory_budget_bytes
        self.partitioning = partitioning
        self.time_partition = time_partition
        self.time_partition_format = time_partition_format
        self.name = name

    # ------------------------------------------------------------------ set-up

    @property
    def where(self) -> str:
        return f"Parquet source {self.name or os.fspath(self.path)!r}"

    def _validate(self) -> dict[str, str]:
        check_column_name(self.time_column, where=self.where)
        if not isinstance(self.batch_rows, int) or self.batch_rows < 1:
            raise ConfigurationError(f"batch_rows must be a positive integer, got "
                                     f"{self.batch_rows!r}", where=self.where,
                                     hint="e.g. 65536 rows per batch")
        if not isinstance(self.memory_budget_bytes, int) or self.memory_budget_bytes < 0:
            raise ConfigurationError(f"memory_budget_bytes must be a non-negative integer, got "
                                     f"{self.memory_budget_bytes!r}", where=self.where,
                                     hint="e.g. 536870912 for 512 MiB")
        if self.partitioning not in ("hive", None):
            raise ConfigurationError(f"partitioning {self.partitioning!r} is not supported",
                                     where=self.where, hint="use 'hive' or None")
        declared = declared_schema(self.schema, where=self.where)
        if declared and self.time_column in declared and \
                declared[self.time_column] not in ("timestamp", "date"):
            raise ConfigurationError(
                f"time column {self.time_column!r} is declared {declared[self.time_column]!r}",
                where=self.where, hint="declare it 'timestamp' or 'date'")
        return declared

    def _root(self) -> Path:
        root = Path(os.fspath(self.path)).expanduser().absolute()
        if not root.exists():
            raise SourceError(f"path {os.fspath(root)!r} does not exist", where=self.where,
                              hint="check the path in the monitor's source settings",
                              file=os.fspath(root))
        return root

    def _dataset(self) -> ds.FileSystemDataset:
        root = self._root()
        partitioning = "hive" if self.partitioning == "hive" and root.is_dir() else None
        try:
            return ds.dataset(os.fspath(root), format="parquet", partitioning=partitioning)
        except (pa.ArrowException, OSError) as error:
            culprit = self._find_unreadable(root)
            raise SourceError(
                f"cannot open the Parquet dataset: {_describe_arrow_error(error)}",
                where=f"{self.where}, file {culprit or os.fspath(root)!r}",
                hint="the file is corrupt or still being written: replace it, or move it out "
                     "of the folder (names starting with '.' or '_' are ignored)",
                file=culprit or os.fspath(root)) from error

    @staticmethod
    def _find_unreadable(root: Path) -> str | None:
        import pyarrow.parquet as pq

        candidates = [root] if root.is_file() else sorted(
            path for path in root.rglob("*") if path.is_file()
            and not any(part.startswith((".", "_")) for part in path.relative_to(root).parts))
        for candidate in candidates:
            try:
                pq.read_metadata(candidate)
            except (pa.ArrowException, OSError):
                return os.fspath(candidate)
        return None

    def _partition_date(self, fragment: ds.Fragment) -> dt.date | None:
        assert self.time_partition is not None
        keys = ds.get_partition_keys(fragment.partition_expression)
        if self.time_partition not in keys:
            return None
        value = keys[self.time_partition]
        if isinstance(value, dt.datetime):
            return value.date()
        if isinstance(value, dt.date):
            return value
        try:
            return dt.datetime.strptime(str(value), self.time_partition_format).date()
        except ValueError as error:
            raise SourceError(
                f"partition value {self.time_partition}={value!r} is not a date in format "
                f"{self.time_partition_format!r}", where=f"{self.where}, file {fragment.path!r}",
                hint="fix time_partition_format, or drop time_partition",
                file=fragment.path) from error

    def _outside_partitions(self, fragment: ds.Fragment, start: dt.datetime | None,
                            end: dt.datetime | None) -> bool:
        if self.time_partition is None:
            return False
        day = self._partition_date(fragment)
        if day is None:
            return False
        day_start = dt.datetime(day.year, day.month, day.day, tzinfo=dt.UTC)
        day_end = _partition_end(day_start, self.time_partition_format)
        return (end is not None and day_start >= end) or (start is not None and day_end <= start)

    def _check_file(self, fragment: ds.ParquetFileFragment, dataset_schema: pa.Schema,
                    declared: Mapping[str, str], needed: Sequence[str]) -> pa.Schema:
        path = fragment.path
        try:
            fragment.ensure_complete_metadata()
            physical = fragment.physical_schema
        except (pa.ArrowException, OSError) as error:
            raise SourceError(
                f"cannot read Parquet file: {_describe_arrow_error(error)}",
                where=f"{self.where}, file {path!r}",
                hint="the file is corrupt or half-written: replace it, or move it out of the "
                     "folder (names starting with '.' or '_' are ignored)",
                file=path) from error
        partition_keys = ds.get_partition_keys(fragment.partition_expression)
        for column in dict.fromkeys([*declared, *needed]):
            if column in partition_keys and column not in physical.names:
                continue
            if column not in physical.names:
                raise DataValidationError(
                    f"column {column!r} is missing from the file (it has "
                    f"{', '.join(map(repr, physical.names))})",
                    where=f"{self.where}, file {path!r}, column {column!r}",
                    hint="fix the writer, or remove the column from the monitor and its schema",
                    file=path, column=column)
            actual = physical.field(column).type
            if column in declared:
                if not type_matches(declared[column], actual):
                    raise DataValidationError(
                        f"column {column!r} has type {actual}, declared {declared[column]!r}",
                        where=f"{self.where}, file {path!r}, column {column!r}",
                        hint="fix the writer, or change the declared type if the change is "
                             "meant", file=path, column=column)
            elif column in dataset_schema.names and not actual.equals(
                    dataset_schema.field(column).type):
                raise DataValidationError(
                    f"column {column!r} has type {actual} here but "
                    f"{dataset_schema.field(column).type} in the dataset's first file",
                    where=f"{self.where}, file {path!r}, column {column!r}",
                    hint="declare the column's type in the source schema to accept both, or "
                         "rewrite the file", file=path, column=column)
        time_type = physical.field(self.time_column).type \
            if self.time_column in physical.names else None
        if time_type is not None and not (pa.types.is_timestamp(time_type)
                                          or pa.types.is_date(time_type)):
            raise DataValidationError(
                f"time column {self.time_column!r} has type {time_type}, not a timestamp or "
                "date", where=f"{self.where}, file {path!r}, column {self.time_column!r}",
                hint="name a timestamp column as the time column", file=path,
                column=self.time_column)
        return physical

    def _plan_file(self, fragment: ds.ParquetFileFragment, columns: Sequence[str],
                   start: dt.datetime | None, end: dt.datetime | None) -> _FilePlan | None:
        path = fragment.path
        stat = os.stat(path)
        metadata = fragment.metadata
        wanted = [index for index in range(metadata.num_columns)
                  if metadata.schema.column(index).path.split(".")[0] in columns]
        low: dt.datetime | None = None
        high: dt.datetime | None = None
        complete_statistics = True
        in_order = True
        previous_high: dt.datetime | None = None
        estimated = 0
        for row_group in fragment.row_groups:
            statistics = (row_group.statistics or {}).get(self.time_column) or {}
            group_low = as_utc_datetime(statistics.get("min"))
            group_high = as_utc_datetime(statistics.get("max"))
            if group_low is None or group_high is None:
                complete_statistics = False
            else:
                if (end is not None and group_low >= end) or \
                        (start is not None and group_high < start):
                    continue  # pushed-down filter skips it too
                if previous_high is not None and group_low < previous_high:
                    in_order = False
                previous_high = group_high
                low = group_low if low is None or group_low < low else low
                high = group_high if high is None or group_high > high else high
            group = metadata.row_group(row_group.id)
            estimated += sum(group.column(index).total_uncompressed_size for index in wanted)
        if complete_statistics and fragment.row_groups and low is None:
            return None  # every row group lies outside the window
        if not complete_statistics:
            low = high = None
        return _FilePlan(fragment, path, stat.st_size, stat.st_mtime_ns, low, high, in_order,
                         estimated)

    def _time_filter(self, time_type: pa.DataType, start: dt.datetime | None,
                     end: dt.datetime | None) -> ds.Expression | None:
        # NULL times are dropped batch by batch (cheaper than a pushed-down is_valid,
        # which pyarrow evaluates on every row even when the statistics show no nulls)
        field = ds.field(self.time_column)
        expression: ds.Expression | None = None

        def scalar(bound: dt.datetime) -> pa.Scalar:
            if pa.types.is_date(time_type):
                # a date d is in the window when its midnight (UTC) is
                midnight = bound.date() if bound.timetz() == dt.time(tzinfo=dt.UTC) \
                    else bound.date() + dt.timedelta(days=1)
                return pa.scalar(midnight, type=time_type)
            if time_type.tz is None:
                return pa.scalar(bound.replace(tzinfo=None), type=time_type)
            return pa.scalar(bound, type=time_type)

        if start is not None:
            expression = field >= scalar(start)
        if end is not None:
            upper = field < scalar(end)
            expression = upper if expression is None else expression & upper
        return expression

    # ------------------------------------------------------------------ public API

    def scan(self, columns: Sequence[str], start: dt.datetime | None = None,
             end: dt.datetime | None = None, *,
             seen_files: Mapping[str, SourceFile] | None = None) -> ParquetScan:
        """The rows of ``[start, end)``, with only ``columns``, in time order.

        Parameters
        ----------
        columns
            Columns to deliver, in this order (partition keys allowed).
        start, end
            Half-open window on the time column (aware datetimes, or None).
        seen_files
            Incremental mode: the file ledger from the history store
            (``HistoryStore.seen_files(monitor)``).  Files in it are skipped; a
            file in it whose size or modification time changed stops the scan
            (its rows would be counted twice).  Pass ``scan.file_entries`` to
            ``HistoryStore.complete_run(files=...)`` so the ledger and the run
            are written together.  A file read in incremental mode is recorded
            whole: rows of it outside the window are not read later.

        Raises
        ------
        SourceError
            Unreadable, corrupt or half-written file (named), changed file in
            incremental mode, missing path.
        DataValidationError
            A missing column or a changed type (file and column named).
        """
        declared = self._validate()
        names = check_columns(columns, where=self.where)
        low, high = check_window(start, end, where=self.where)
        dataset = self._dataset()
        schema = dataset.schema
        if self.time_column not in schema.names:
            raise DataValidationError(
                f"time column {self.time_column!r} is not in the dataset (columns: "
                f"{', '.join(map(repr, schema.names))})",
                where=f"{self.where}, column {self.time_column!r}",
                hint="set time_column to one of the listed columns", column=self.time_column)
        for column in names:
            if column not in schema.names:
                first = next(iter(dataset.files), os.fspath(self.path))
                raise DataValidationError(
                    f"column {column!r} is missing (columns: "
                    f"{', '.join(map(repr, schema.names))})",
                    where=f"{self.where}, file {first!r}, column {column!r}",
                    hint="fix the column name in the family, or the writer",
                    file=first, column=column)
        read_columns = list(dict.fromkeys([*names, self.time_column]))
        time_type = schema.field(self.time_column).type
        expression = self._time_filter(time_type, low, high)
        plans: list[_FilePlan] = []
        considered = 0
        for fragment in dataset.get_fragments():
            if self._outside_partitions(fragment, low, high):
                continue
            considered += 1
            assert isinstance(fragment, ds.ParquetFileFragment)
            if seen_files is not None and fragment.path in seen_files:
                seen = seen_files[fragment.path]
                stat = os.stat(fragment.path)
                if stat.st_size != seen.size_bytes or stat.st_mtime_ns != seen.modified_ns:
                    raise SourceError(
                        "file changed after an earlier run counted it (size or modification "
                        "time differs); reading it again would count its rows twice",
                        where=f"{self.where}, file {fragment.path!r}",
                        hint="write new rows to new files; if the rewrite is meant, remove the "
                             "file from the ledger (prune) or start a new monitor",
                        file=fragment.path)
                continue
            self._check_file(fragment, schema, declared, read_columns)
            plan = self._plan_file(fragment, read_columns, low, high)
            if plan is not None:
                plans.append(plan)
        return ParquetScan(self, names, low, high, plans, schema, expression,
                           files_considered=considered)

    def check(self) -> SourceSummary:
        """Open every file's footer and check it against the declared schema.

        Cheap: no data pages are read.  Raises the same errors as :meth:`scan`.
        """
        declared = self._validate()
        dataset = self._dataset()
        schema = dataset.schema
        if self.time_column not in schema.names:
            raise DataValidationError(
                f"time column {self.time_column!r} is not in the dataset (columns: "
                f"{', '.join(map(repr, schema.names))})",
                where=f"{self.where}, column {self.time_column!r}",
                hint="set time_column to one of the listed columns", column=self.time_column)
        rows = 0
        files = 0
        low: dt.datetime | None = None
        high: dt.datetime | None = None
        for fragment in dataset.get_fragments():
            assert isinstance(fragment, ds.ParquetFileFragment)
            self._check_file(fragment, schema, declared, [self.time_column])
            files += 1
            rows += fragment.metadata.num_rows
            file_low, file_high = self._time_range(fragment)
            if file_low is not None and (low is None or file_low < low):
                low = file_low
            if file_high is not None and (high is None or file_high > high):
                high = file_high
        return SourceSummary(self.where, {field.name: str(field.type) for field in schema},
                             rows, files, low, high)

    def _time_range(self, fragment: ds.ParquetFileFragment) -> tuple[dt.datetime | None,
                                                                      dt.datetime | None]:
        low: dt.datetime | None = None
        high: dt.datetime | None = None
        for row_group in fragment.row_groups:
            statistics = (row_group.statistics or {}).get(self.time_column) or {}
            group_low = as_utc_datetime(statistics.get("min"))
            group_high = as_utc_datetime(statistics.get("max"))
            if group_low is None or group_high is None:
                return self._computed_time_range(fragment)
            low = group_low if low is None or group_low < low else low
            high = group_high if high is None or group_high > high else high
        return low, high

    def _computed_time_range(self, fragment: ds.ParquetFileFragment) -> tuple[
            dt.datetime | None, dt.datetime | None]:
        try:
            table = fragment.to_table(columns=[self.time_column])
        except (pa.ArrowException, OSError) as error:
            raise SourceError(f"cannot read Parquet file: {_describe_arrow_error(error)}",
                              where=f"{self.where}, file {fragment.path!r}",
                              hint="replace the file or move it out of the folder",
                              file=fragment.path) from error
        extremes = pc.min_max(table.column(self.time_column))
        return as_utc_datetime(extremes["min"]), as_utc_datetime(extremes["max"])

    def max_time(self) -> dt.datetime | None:
        """Latest time value in the source (from file statistics where present)."""
        return self.check().max_time


class ParquetScan(Scan):
    """A window of a :class:`ParquetSource` (see :class:`storage.sources.Scan`).

    Extra attributes: ``files`` (the files read, in reading order),
    ``files_considered`` (files left after partition pruning, before the
    footers' statistics), ``file_entries`` (ledger records, after an iteration)
    and ``will_sort`` (the window is sorted in memory).
    """

    def __init__(self, source: ParquetSource, columns: tuple[str, ...],
                 start: dt.datetime | None, end: dt.datetime | None, plans: list[_FilePlan],
                 schema: pa.Schema, expression: ds.Expression | None, *,
                 files_considered: int) -> None:
        super().__init__(columns, start, end, time_column=source.time_column,
                         where=source.where)
        self._source = source
        self._schema = schema
        self._expression = expression
        self._read_columns = list(dict.fromkeys([*columns, source.time_column]))
        self.files_considered = files_considered
        far_future = dt.datetime.max.replace(tzinfo=dt.UTC)
        self._plans = sorted(plans, key=lambda plan: (plan.min_time or far_future, plan.path))
        ordered = all(plan.row_groups_in_order and plan.min_time is not None
                      for plan in self._plans)
        for before, after in zip(self._plans, self._plans[1:], strict=False):
            if before.max_time is None or after.min_time is None or \
                    after.min_time < before.max_time:
                ordered = False
        self._known_out_of_order = not ordered and len(self._plans) > 0 and any(
            plan.min_time is not None for plan in self._plans)
        self.estimated_bytes = sum(plan.estimated_bytes for plan in self._plans)
        self._fits_budget = self.estimated_bytes * _SORT_OVERHEAD <= source.memory_budget_bytes
        self.will_sort = self._known_out_of_order and self._fits_budget
        self._in_time_order = self.will_sort or not self._known_out_of_order
        self._sorted: pa.Table | None = None
        self._file_rows: dict[str, tuple[int, dt.datetime | None, dt.datetime | None]] = {}

    @property
    def files(self) -> tuple[str, ...]:
        return tuple(plan.path for plan in self._plans)

    @property
    def file_entries(self) -> tuple[SourceFile, ...]:
        """Ledger records of the files read (rows and time range after an iteration)."""
        entries = []
        for plan in self._plans:
            rows, low, high = self._file_rows.get(plan.path, (None, plan.min_time,
                                                              plan.max_time))
            entries.append(SourceFile(plan.path, plan.size_bytes, plan.modified_ns, rows,
                                      low, high))
        return tuple(entries)

    def _read_file(self, plan: _FilePlan) -> Iterator[pa.RecordBatch]:
        try:
            batches = plan.fragment.to_batches(
                schema=self._schema, columns=self._read_columns, filter=self._expression,
                batch_size=self._source.batch_rows, use_threads=True)
            for batch in batches:
                times = batch.column(self.time_column)
                if times.null_count:
                    batch = batch.filter(times.is_valid())
                yield batch
        except (pa.ArrowException, OSError) as error:
            raise SourceError(f"cannot read Parquet file: {_describe_arrow_error(error)}",
                              where=f"{self.where}, file {plan.path!r}",
                              hint="the file is corrupt or half-written: replace it, or move "
                                   "it out of the folder", file=plan.path) from error

    def _deliver(self, batch: pa.RecordBatch, tracker: _OrderTracker,
                 file_tracker: _OrderTracker | None = None) -> pa.RecordBatch:
        time_index = batch.schema.get_field_index(self.time_column)
        times = utc_time_array(batch.column(time_index))
        low, high = tracker.observe(times)
        if file_tracker is not None:
            file_tracker.widen(low, high)
        arrays = [times if name == self.time_column else batch.column(name)
                  for name in self.columns]
        return pa.RecordBatch.from_arrays(arrays, names=list(self.columns))

    def _batches(self, tracker: _OrderTracker) -> Iterator[pa.RecordBatch]:
        if self.will_sort:
            yield from self._sorted_batches(tracker)
            return
        for plan in self._plans:
            file_tracker = _OrderTracker(check_order=False)
            rows = 0
            for batch in self._read_file(plan):
                if batch.num_rows == 0:
                    continue
                delivered = self._deliver(batch, tracker, file_tracker)
                rows += batch.num_rows
                yield delivered
            self._file_rows[plan.path] = (rows, file_tracker.min_time, file_tracker.max_time)
        if not tracker.in_order and self._fits_budget:
            self.will_sort = True  # found out of order while reading: sort from now on

    def _sorted_batches(self, tracker: _OrderTracker) -> Iterator[pa.RecordBatch]:
        if self._sorted is None:
            pieces: list[pa.RecordBatch] = []
            for plan in self._plans:
                file_batches = [batch for batch in self._read_file(plan) if batch.num_rows]
                file_tracker = _OrderTracker(check_order=False)
                for batch in file_batches:
                    file_tracker.observe(utc_time_array(batch.column(self.time_column)))
                self._file_rows[plan.path] = (sum(b.num_rows for b in file_batches),
                                              file_tracker.min_time, file_tracker.max_time)
                pieces.extend(file_batches)
            table = pa.Table.from_batches(pieces, schema=pa.schema(
                [self._schema.field(name) for name in self._read_columns]))
            self._sorted = table.sort_by([(self.time_column, "ascending")])
        for batch in self._sorted.to_batches(max_chunksize=self._source.batch_rows):
            if batch.num_rows:
                yield self._deliver(batch, tracker)
