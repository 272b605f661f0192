"""Build the adapters a spec names: its history store and each monitor's source."""

from __future__ import annotations

from typing import Any

from monitor.errors import ConfigurationError, StorageError
from storage.history import HistoryStore
from storage.sources import ParquetSource, SqlSource

from .spec import MonitorSpec, Spec

__all__ = ["open_store", "open_source"]


def open_store(spec: Spec) -> HistoryStore:
    """The spec's history store, created or upgraded to the package's schema version.

    A store that cannot be opened is a configuration problem of ``history.store``
    (:class:`ConfigurationError`, exit code 2): nothing can be recorded.
    """
    store = HistoryStore(spec.store_url, url_env=spec.store_env, table_prefix=spec.table_prefix)
    try:
        store.upgrade()
    except StorageError as error:
        store.close()
        key = "history.store_env" if spec.store_env else "history.store"
        raise ConfigurationError(f"{error.what} (store {store.describe()})", where=key,
                                 hint=error.hint or f"check {key}") from error
    return store


def open_source(monitor: MonitorSpec) -> Any:
    """The monitor's source (Parquet or SQL), from its spec."""
    source = monitor.source
    if source.kind == "parquet":
        assert source.path is not None
        return ParquetSource(source.path, time_column=source.time_column,
                             schema=dict(source.schema) or None, batch_rows=source.batch_rows,
                             time_partition=source.time_partition,
                             time_partition_format=source.time_partition_format,
                             name=f"{monitor.name}: {source.path.name}")
    return SqlSource(source.url, url_env=source.url_env, table=source.table, query=source.query,
                     time_column=source.time_column, schema=dict(source.schema) or None,
                     batch_rows=source.batch_rows, name=f"{monitor.name}: "
                     f"{source.table or 'query'}")
