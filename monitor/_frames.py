"""The edge between tabular inputs and the core: frames, Arrow tables, files -> numpy chunks.

The core only sees mappings of column name to 1-D numpy arrays (floats for
numbers, object arrays of ``str``/``None`` for text).  This module turns a pandas
DataFrame, a pyarrow Table or RecordBatch, or a CSV/Parquet path into a
re-iterable source of such chunks.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq

from .errors import DataValidationError, SourceError

__all__ = ["DEFAULT_CHUNK_ROWS", "TableInput", "arrow_to_columns", "as_table", "chunk_source"]

#: Rows per chunk: large enough to amortise the QR, small enough to bound memory.
DEFAULT_CHUNK_ROWS = 65_536

TableInput = pd.DataFrame | pa.Table | pa.RecordBatch | str | Path


def _column_array(column: pa.ChunkedArray | pa.Array, name: str) -> np.ndarray:
    kind = column.type
    if pa.types.is_dictionary(kind):
        column = column.cast(kind.value_type) if isinstance(column, pa.Array) else pa.chunked_array(
            [c.dictionary_decode() for c in column.chunks], type=kind.value_type)
        kind = column.type
    if pa.types.is_boolean(kind):
        return np.asarray(column.to_numpy(zero_copy_only=False), dtype=object).astype(np.float64) \
            if column.null_count else column.to_numpy(zero_copy_only=False).astype(np.float64)
    if pa.types.is_integer(kind) or pa.types.is_floating(kind) or pa.types.is_decimal(kind):
        if column.null_count:
            return np.asarray(column.cast(pa.float64()).to_numpy(zero_copy_only=False),
                              dtype=np.float64)
        return np.asarray(column.to_numpy(zero_copy_only=False), dtype=np.float64)
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        return np.asarray(column.to_numpy(zero_copy_only=False), dtype=object)
    if pa.types.is_timestamp(kind) or pa.types.is_date(kind):
        return np.asarray(column.to_numpy(zero_copy_only=False))
    if pa.types.is_null(kind):
        return np.full(len(column), np.nan)
    raise DataValidationError(f"column {name!r} has type {kind}, which a model cannot use",
                              where=f"column {name!r}",
                              hint="convert it to a number or text upstream")


def arrow_to_columns(batch: pa.RecordBatch | pa.Table, columns: Sequence[str] | None = None
                     ) -> dict[str, np.ndarray]:
    """One Arrow batch/table as a mapping of column name to numpy array."""
    names = list(columns) if columns is not None else list(batch.schema.names)
    return {name: _column_array(batch.column(name), name) for name in names
            if name in batch.schema.names}


def _frame_to_columns(frame: pd.DataFrame, columns: Sequence[str] | None) -> dict[str, np.ndarray]:
    names = list(columns) if columns is not None else [str(c) for c in frame.columns]
    result: dict[str, np.ndarray] = {}
    for name in names:
        if name not in frame.columns:
            continue
        series = frame[name]
        dtype = series.dtype
        if pd.api.types.is_bool_dtype(dtype) or pd.api.types.is_numeric_dtype(dtype):
            result[name] = series.to_numpy(dtype=np.float64, na_value=np.nan)
        elif isinstance(dtype, pd.CategoricalDtype) or pd.api.types.is_string_dtype(dtype) \
                or dtype == object:
            values = series.astype(object).to_numpy()
            result[name] = np.array([None if (v is None or v is pd.NA or
                                              (isinstance(v, float) and np.isnan(v)))
                                     else v for v in values], dtype=object)
        else:
            result[name] = series.to_numpy()
    return result


def as_table(data: TableInput) -> pd.DataFrame | pa.Table:
    """Open a path (CSV or Parquet) as an Arrow table; pass frames and tables through."""
    if isinstance(data, (pd.DataFrame, pa.Table)):
        return data
    if isinstance(data, pa.RecordBatch):
        return pa.Table.from_batches([data])
    path = Path(data)
    if not path.exists():
        raise SourceError(f"no file at {str(path)!r}", where=str(path),
                          hint="check the path (CSV and Parquet files are read)")
    suffix = path.suffix.lower()
    try:
        if suffix in (".parquet", ".pq") or path.is_dir():
            return pq.read_table(path)
        if suffix in (".csv", ".txt", ".gz"):
            return pa_csv.read_csv(path)
    except (pa.ArrowInvalid, OSError) as error:
        raise SourceError(f"cannot read {str(path)!r}: {str(error).splitlines()[0]}",
                          where=str(path),
                          hint="check that the file is complete and in the format its "
                          "name says") from error
    raise SourceError(f"unknown file type {suffix!r}", where=str(path),
                      hint="pass a .csv or .parquet file")


def _parquet_path(data: TableInput) -> Path | None:
    """The path when ``data`` names an existing Parquet file or folder (read in batches)."""
    if not isinstance(data, (str, Path)):
        return None
    path = Path(data)
    if path.exists() and (path.suffix.lower() in (".parquet", ".pq") or path.is_dir()):
        return path
    return None


def _parquet_dataset(path: Path) -> Any:
    import pyarrow.dataset as pa_dataset

    # pre_buffer=False: with pre-buffering pyarrow keeps every row group's column
    # chunks it has read alive until the scan ends, so memory grew with the rows
    parquet = pa_dataset.ParquetFileFormat(
        default_fragment_scan_options=pa_dataset.ParquetFragmentScanOptions(pre_buffer=False))
    try:
        return pa_dataset.dataset(path, format=parquet)
    except (pa.ArrowInvalid, OSError) as error:
        raise SourceError(f"cannot read {str(path)!r}: {str(error).splitlines()[0]}",
                          where=str(path),
                          hint="check that the file is complete and in the format its "
                          "name says") from error


def _parquet_chunk_source(path: Path, columns: Sequence[str] | None, chunk_rows: int) -> Any:
    """Batches straight from the file: memory holds one chunk, whatever the file's size."""
    dataset = _parquet_dataset(path)
    if len(dataset.schema.names) == 0:
        raise DataValidationError("the data have no columns", where="input",
                                  hint="check the file")
    names = [c for c in (columns if columns is not None else dataset.schema.names)
             if c in dataset.schema.names]

    def parquet_chunks() -> Iterator[Mapping[str, np.ndarray]]:
        try:
            # little read-ahead: memory holds about one chunk, not the file
            for batch in dataset.to_batches(columns=names, batch_size=chunk_rows,
                                            batch_readahead=1, fragment_readahead=1):
                if batch.num_rows:
                    yield arrow_to_columns(batch, names)
        except (pa.ArrowInvalid, OSError) as error:
            raise SourceError(f"cannot read {str(path)!r}: {str(error).splitlines()[0]}",
                              where=str(path), hint="check that the file is complete") from error
    return parquet_chunks


def chunk_source(data: TableInput, columns: Sequence[str] | None = None,
                 chunk_rows: int = DEFAULT_CHUNK_ROWS) -> Any:
    """A callable returning a fresh iterator of column chunks over ``data``.

    A Parquet path is read batch by batch (only ``columns``), never whole.
    """
    parquet = _parquet_path(data)
    if parquet is not None:
        return _parquet_chunk_source(parquet, columns, chunk_rows)
    table = as_table(data)
    if table.shape[1] == 0 or (isinstance(table, pd.DataFrame) and table.empty and
                                len(table.columns) == 0):
        raise DataValidationError("the data have no columns", where="input",
                                  hint="check the file")
    if isinstance(table, pd.DataFrame):
        frame = table

        def frame_chunks() -> Iterator[Mapping[str, np.ndarray]]:
            for start in range(0, max(len(frame), 1), chunk_rows):
                yield _frame_to_columns(frame.iloc[start:start + chunk_rows], columns)
        return frame_chunks

    arrow_table = table

    def arrow_chunks() -> Iterator[Mapping[str, np.ndarray]]:
        if arrow_table.num_rows == 0:
            yield arrow_to_columns(arrow_table, columns)
            return
        for batch in arrow_table.to_batches(max_chunksize=chunk_rows):
            yield arrow_to_columns(batch, columns)
    return arrow_chunks


def column_names(data: TableInput) -> list[str]:
    parquet = _parquet_path(data)
    if parquet is not None:
        return list(_parquet_dataset(parquet).schema.names)
    table = as_table(data)
    if isinstance(table, pd.DataFrame):
        return [str(c) for c in table.columns]
    return list(table.schema.names)


def iterate(source: Any) -> Iterable[Mapping[str, np.ndarray]]:
    return source()
