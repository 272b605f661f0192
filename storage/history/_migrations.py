"""Versioned upgrades of the history schema.

Each :class:`Migration` moves the schema from ``version - 1`` to ``version`` and
is recorded in the ``schema_version`` table when it has run.  The steps ship
with the package; ``HistoryStore.upgrade()`` (command line: ``store upgrade``)
applies the missing ones in order.

Rule for future steps: a step describes the change it makes with its own
statements (``ALTER TABLE ...`` through SQLAlchemy), never by calling
``create_all`` on the *current* table definitions, so that an old store upgraded
step by step ends exactly where a new store created by the latest steps ends.
Step 1 may use the table definitions because they are, by construction, the
version-1 tables; when a step 2 changes a table, step 1 must first be frozen
to its own copy of the version-1 definitions.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from collections.abc import Callable

import sqlalchemy as sa

from storage.history._schema import SCHEMA_VERSION, HistoryTables

__all__ = ["MIGRATIONS", "Migration", "applied_version"]


@dataclasses.dataclass(frozen=True, slots=True)
class Migration:
    """One schema step: ``apply`` runs inside its own transaction."""

    version: int
    description: str
    apply: Callable[[sa.Connection, HistoryTables], None]


def _create_version_1(connection: sa.Connection, tables: HistoryTables) -> None:
    payload = [table for table in tables.all if table is not tables.schema_version]
    tables.metadata.create_all(connection, tables=payload, checkfirst=True)


MIGRATIONS: tuple[Migration, ...] = (
    Migration(1, "create the history tables", _create_version_1),
)

if MIGRATIONS[-1].version != SCHEMA_VERSION:  # pragma: no cover - a packaging mistake
    raise RuntimeError("SCHEMA_VERSION does not match the last migration")


def applied_version(connection: sa.Connection, tables: HistoryTables) -> int:
    """Highest schema version recorded in the store; 0 for a store never upgraded."""
    if not sa.inspect(connection).has_table(tables.schema_version.name):
        return 0
    version = connection.execute(sa.select(sa.func.max(tables.schema_version.c.version)))
    return int(version.scalar() or 0)


def record(connection: sa.Connection, tables: HistoryTables, migration: Migration,
           package_version: str) -> None:
    """Note in ``schema_version`` that ``migration`` has been applied."""
    connection.execute(tables.schema_version.insert().values(
        version=migration.version,
        applied_at=dt.datetime.now(dt.UTC),
        package_version=package_version,
        description=migration.description,
    ))
