"""Build the adapters a spec names: its history store and each monitor's source."""

from __future__ import annotations

from typing import Any

from storage.history import HistoryStore
from storage.sources import ParquetSource, SqlSource

from .spec import MonitorSpec, Spec

__all__ = ["open_store", "open_source"]


def open_store(spec: Spec) -> HistoryStore:
    """The spec's history store, created or upgraded to the package's schema version."""
    store = HistoryStore(spec.store_url, url_env=spec.store_env, table_prefix=spec.table_prefix)
    store.upgrade()
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
