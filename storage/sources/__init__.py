"""Sources: Parquet datasets and SQL tables or queries, read as Arrow record batches.

``source.scan(columns, start, end)`` returns a ``Scan``: iterable more than once,
yielding ``pyarrow.RecordBatch`` objects with exactly the requested columns in
time order (see ``Scan`` for ``in_time_order``, ``rows``, ``files``).
``source.check()`` is a cheap reachability and schema check, ``source.max_time()``
the latest time value.  Time conventions and declared type names are described
in ``storage.sources._base``.
"""

from storage.sources._base import DECLARED_TYPES, Scan, SourceSummary
from storage.sources._parquet import ParquetScan, ParquetSource
from storage.sources._sql import SqlScan, SqlSource

__all__ = [
    "DECLARED_TYPES",
    "ParquetScan",
    "ParquetSource",
    "Scan",
    "SourceSummary",
    "SqlScan",
    "SqlSource",
]
