"""The history tables, declared once with SQLAlchemy Core.

Every table and column here is a public contract: users query them with their
own SQL.  Change them only through a new step in ``_migrations.py`` (and the
table reference in the README).

Conventions shared by every table
---------------------------------
- Instants are stored as UTC without a zone (``TIMESTAMP`` / ``DATETIME(6)``)
  and read back as timezone-aware UTC ``datetime``.
- Floats are double precision; a non-finite value (NaN, ±inf) is stored as NULL.
- JSON columns hold plain JSON: non-finite numbers inside them become ``null``
  (PostgreSQL rejects ``NaN`` tokens), on PostgreSQL the type is ``jsonb``.
- ``segment`` is ``''`` for the whole data set (a key column cannot be NULL).
- On MariaDB/MySQL the tables use ``utf8mb4`` with a binary collation, so names
  that differ only by case are different names, as on the other backends.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from collections.abc import Mapping
from typing import Any

import sqlalchemy as sa
from sqlalchemy.dialects import mysql, postgresql

__all__ = ["SCHEMA_VERSION", "HistoryTables", "build_tables", "json_safe"]

#: The schema version this package writes (see ``_migrations.MIGRATIONS``).
SCHEMA_VERSION = 1

#: Length of name columns (monitor, model, segment, term, metric, check).
NAME_LENGTH = 200


class UtcDateTime(sa.types.TypeDecorator[dt.datetime]):
    """An instant stored as naive UTC, returned as aware UTC.

    Naive input is refused: every instant reaching the store must say its zone,
    so a local-time value cannot slip in unnoticed.
    """

    impl = sa.DateTime
    cache_ok = True

    def load_dialect_impl(self, dialect: sa.Dialect) -> sa.types.TypeEngine[Any]:
        if dialect.name in ("mysql", "mariadb"):
            # DATETIME without fsp truncates to whole seconds on MariaDB/MySQL
            return dialect.type_descriptor(mysql.DATETIME(fsp=6))
        return dialect.type_descriptor(sa.DateTime(timezone=False))

    def process_bind_param(self, value: Any, dialect: sa.Dialect) -> dt.datetime | None:
        if value is None:
            return None
        if not isinstance(value, dt.datetime):
            raise TypeError(f"expected a datetime, got {type(value).__name__}: {value!r}")
        if value.tzinfo is None or value.utcoffset() is None:
            raise TypeError(f"naive datetime {value.isoformat()} given; pass a timezone-aware "
                            "UTC datetime")
        return value.astimezone(dt.UTC).replace(tzinfo=None)

    def process_result_value(self, value: Any, dialect: sa.Dialect) -> dt.datetime | None:
        if value is None:
            return None
        if isinstance(value, str):  # SQLite reflection edge: plain text timestamps
            value = dt.datetime.fromisoformat(value)
        if value.tzinfo is None:
            return value.replace(tzinfo=dt.UTC)
        return value.astimezone(dt.UTC)


class FiniteFloat(sa.types.TypeDecorator[float]):
    """A double-precision float; NaN and ±inf are stored as NULL."""

    impl = sa.Double
    cache_ok = True

    def process_bind_param(self, value: Any, dialect: sa.Dialect) -> float | None:
        if value is None:
            return None
        number = float(value)
        return number if math.isfinite(number) else None


def json_safe(value: Any) -> Any:
    """A copy of ``value`` that serialises to strict JSON.

    Non-finite floats become ``None``; tuples become lists; NumPy scalars and
    arrays (anything with ``tolist``) become Python values; datetimes become
    ISO 8601 strings in UTC.  Mapping keys become strings.
    """
    if value is None or isinstance(value, (bool, str, int)):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(key): json_safe(item) for key, item in value.items()}
    if isinstance(value, (list, tuple, set, frozenset)):
        return [json_safe(item) for item in value]
    if isinstance(value, dt.datetime):
        if value.tzinfo is None:
            value = value.replace(tzinfo=dt.UTC)
        return value.astimezone(dt.UTC).isoformat()
    if isinstance(value, dt.date):
        return value.isoformat()
    if hasattr(value, "tolist"):  # NumPy scalar or array, without importing NumPy
        return json_safe(value.tolist())
    if hasattr(value, "__float__"):  # Decimal and friends
        return json_safe(float(value))
    raise TypeError(f"value of type {type(value).__name__} cannot be stored as JSON: {value!r}")


class SafeJson(sa.types.TypeDecorator[Any]):
    """JSON (``jsonb`` on PostgreSQL); values pass through :func:`json_safe` first."""

    impl = sa.JSON
    cache_ok = True

    def load_dialect_impl(self, dialect: sa.Dialect) -> sa.types.TypeEngine[Any]:
        if dialect.name == "postgresql":
            return dialect.type_descriptor(postgresql.JSONB())
        return dialect.type_descriptor(sa.JSON())

    def process_bind_param(self, value: Any, dialect: sa.Dialect) -> Any:
        if value is None:
            return None
        safe = json_safe(value)
        json.dumps(safe, allow_nan=False)  # proves the promise before the database sees it
        return safe


def _long_text() -> sa.types.TypeEngine[str]:
    # TEXT on MariaDB/MySQL stops at 64 KiB; messages and payloads may be longer
    return sa.Text().with_variant(mysql.LONGTEXT(), "mysql", "mariadb")


class HistoryTables:
    """The history tables of one store, named ``<prefix><table>``.

    Attributes are the :class:`sqlalchemy.Table` objects (``runs``, ``metrics``,
    ...); ``metadata`` holds them all.
    """

    def __init__(self, prefix: str) -> None:
        self.prefix = prefix
        self.metadata = sa.MetaData(naming_convention={
            "ix": "ix_%(table_name)s_%(column_0_N_name)s",
            "uq": "uq_%(table_name)s_%(column_0_N_name)s",
            "pk": "pk_%(table_name)s",
            "fk": "fk_%(table_name)s_%(column_0_N_name)s",
        })
        metadata = self.metadata
        options: dict[str, Any] = {
            "mysql_engine": "InnoDB",
            "mysql_charset": "utf8mb4",
            "mysql_collate": "utf8mb4_bin",
        }

        def name(column: str, *, nullable: bool = False, length: int = NAME_LENGTH,
                 **kwargs: Any) -> sa.Column[Any]:
            return sa.Column(column, sa.String(length), nullable=nullable, **kwargs)

        def table(suffix: str, *columns: Any, comment: str) -> sa.Table:
            return sa.Table(prefix + suffix, metadata, *columns, comment=comment, **options)

        self.schema_version = table(
            "schema_version",
            sa.Column("version", sa.Integer, primary_key=True, autoincrement=False),
            sa.Column("applied_at", UtcDateTime, nullable=False),
            sa.Column("package_version", sa.String(40), nullable=False),
            sa.Column("description", sa.String(400), nullable=False),
            comment="one row per applied schema migration",
        )
        # The slot ledger: one row per (monitor, scheduled slot).  The primary key is
        # what makes two schedulers sharing a store record a night once.
        self.slots = table(
            "slots",
            name("monitor", primary_key=True),
            sa.Column("slot_at", UtcDateTime, primary_key=True),
            sa.Column("status", sa.String(20), nullable=False),
            sa.Column("attempts", sa.Integer, nullable=False),
            sa.Column("owner", sa.String(NAME_LENGTH), nullable=False),
            sa.Column("lease_until", UtcDateTime, nullable=False),
            sa.Column("updated_at", UtcDateTime, nullable=False),
            sa.Column("run_id", sa.BigInteger, nullable=True),
            comment="slot ledger: status of each scheduled slot of each monitor",
        )
        self.attempts = table(
            "attempts",
            name("monitor", primary_key=True),
            sa.Column("slot_at", UtcDateTime, primary_key=True),
            sa.Column("attempt", sa.Integer, primary_key=True, autoincrement=False),
            sa.Column("owner", sa.String(NAME_LENGTH), nullable=False),
            sa.Column("claimed_at", UtcDateTime, nullable=False),
            sa.Column("ended_at", UtcDateTime, nullable=True),
            sa.Column("outcome", sa.String(20), nullable=False),
            sa.Column("run_id", sa.BigInteger, nullable=True),
            comment="every attempt at a slot: running, completed, failed or interrupted",
        )
        self.runs = table(
            "runs",
            sa.Column("run_id", sa.BigInteger().with_variant(sa.Integer, "sqlite"),
                      primary_key=True, autoincrement=True),
            name("monitor"),
            sa.Column("slot_at", UtcDateTime, nullable=False),
            sa.Column("attempt", sa.Integer, nullable=False),
            sa.Column("status", sa.String(20), nullable=False),
            sa.Column("owner", sa.String(NAME_LENGTH), nullable=False),
            sa.Column("window_start", UtcDateTime, nullable=True),
            sa.Column("window_end", UtcDateTime, nullable=True),
            sa.Column("rows_read", sa.BigInteger, nullable=True),
            sa.Column("rows_dropped", sa.BigInteger, nullable=True),
            sa.Column("watermark_at", UtcDateTime, nullable=True),
            sa.Column("started_at", UtcDateTime, nullable=True),
            sa.Column("finished_at", UtcDateTime, nullable=False),
            sa.Column("error_step", sa.String(NAME_LENGTH), nullable=True),
            sa.Column("error_kind", sa.String(40), nullable=True),
            sa.Column("error_message", _long_text(), nullable=True),
            sa.Column("timings", SafeJson, nullable=True),
            sa.Column("detail", SafeJson, nullable=True),
            sa.Column("package_version", sa.String(40), nullable=False),
            sa.UniqueConstraint("monitor", "slot_at", "attempt"),
            comment="one row per finished attempt (completed or failed) of a slot",
        )
        sa.Index(None, self.runs.c.monitor, self.runs.c.slot_at)

        def run_fk() -> sa.Column[Any]:
            return sa.Column("run_id", sa.BigInteger().with_variant(sa.Integer, "sqlite"),
                             sa.ForeignKey(self.runs.c.run_id), primary_key=True,
                             autoincrement=False)

        self.metrics = table(
            "metrics",
            run_fk(),
            name("segment", primary_key=True),
            name("model", primary_key=True),
            name("metric", primary_key=True),
            sa.Column("value", FiniteFloat, nullable=True),
            comment="one row per run, segment, model and scalar measure (R², AIC, weight, ...)",
        )
        self.coefficients = table(
            "coefficients",
            run_fk(),
            name("segment", primary_key=True),
            name("model", primary_key=True),
            name("term", primary_key=True),
            sa.Column("estimate", FiniteFloat, nullable=True),
            sa.Column("std_error", FiniteFloat, nullable=True),
            sa.Column("ci_lower", FiniteFloat, nullable=True),
            sa.Column("ci_upper", FiniteFloat, nullable=True),
            sa.Column("ci_level", FiniteFloat, nullable=True),
            sa.Column("p_value", FiniteFloat, nullable=True),
            comment="one row per run, segment, model and coefficient",
        )
        self.checks = table(
            "checks",
            run_fk(),
            name("segment", primary_key=True),
            name("model", primary_key=True),
            name("check_name", primary_key=True),
            sa.Column("statistic", FiniteFloat, nullable=True),
            sa.Column("p_value", FiniteFloat, nullable=True),
            sa.Column("df", FiniteFloat, nullable=True),
            sa.Column("df2", FiniteFloat, nullable=True),
            sa.Column("verdict", sa.String(40), nullable=False),
            sa.Column("is_exact", sa.Boolean, nullable=True),
            sa.Column("sample_size", sa.BigInteger, nullable=True),
            sa.Column("rows", sa.BigInteger, nullable=True),
            sa.Column("detail", SafeJson, nullable=True),
            comment="one row per run, segment, model and assumption check",
        )
        self.comparisons = table(
            "comparisons",
            run_fk(),
            name("segment", primary_key=True),
            name("model", primary_key=True),
            name("other_model", primary_key=True),
            # 100, not 200: MariaDB keys stop at 3072 bytes (4 bytes per utf8mb4 character)
            name("test", primary_key=True, length=100),
            sa.Column("statistic", FiniteFloat, nullable=True),
            sa.Column("p_value", FiniteFloat, nullable=True),
            sa.Column("df", FiniteFloat, nullable=True),
            sa.Column("df2", FiniteFloat, nullable=True),
            sa.Column("verdict", sa.String(40), nullable=True),
            sa.Column("detail", SafeJson, nullable=True),
            comment="one row per run, segment, pair of models and comparison test",
        )
        self.verdicts = table(
            "verdicts",
            run_fk(),
            name("segment", primary_key=True),
            name("criterion", primary_key=True),
            name("best_model", nullable=True),
            name("chosen_model", nullable=True),
            sa.Column("is_chosen_best", sa.Boolean, nullable=True),
            sa.Column("margin", FiniteFloat, nullable=True),
            sa.Column("detail", SafeJson, nullable=True),
            comment="one row per run, segment and criterion: which candidate was best",
        )
        self.baselines = table(
            "baselines",
            sa.Column("baseline_id", sa.BigInteger().with_variant(sa.Integer, "sqlite"),
                      primary_key=True, autoincrement=True),
            name("monitor"),
            name("segment"),
            name("model"),
            sa.Column("run_id", sa.BigInteger, nullable=True),
            sa.Column("created_at", UtcDateTime, nullable=False),
            sa.Column("window_start", UtcDateTime, nullable=True),
            sa.Column("window_end", UtcDateTime, nullable=True),
            sa.Column("format_version", sa.Integer, nullable=False),
            sa.Column("payload", SafeJson, nullable=False),
            comment="baseline summaries (state, coefficients, residual bins) used by drift checks",
        )
        sa.Index(None, self.baselines.c.monitor, self.baselines.c.segment,
                 self.baselines.c.model, self.baselines.c.created_at)
        self.alerts = table(
            "alerts",
            sa.Column("alert_id", sa.BigInteger().with_variant(sa.Integer, "sqlite"),
                      primary_key=True, autoincrement=True),
            # sha256 of (monitor, segment, model, kind): fixed length, so the unique
            # index fits MariaDB's key limit whatever the names
            sa.Column("alert_key", sa.String(64), nullable=False, unique=True),
            name("monitor"),
            name("segment"),
            name("model"),
            name("kind"),
            sa.Column("severity", sa.String(20), nullable=False),
            sa.Column("state", sa.String(20), nullable=False),
            sa.Column("snooze_until", UtcDateTime, nullable=True),
            sa.Column("message", _long_text(), nullable=False),
            sa.Column("evidence", SafeJson, nullable=True),
            sa.Column("first_seen_run_id", sa.BigInteger, nullable=True),
            sa.Column("last_seen_run_id", sa.BigInteger, nullable=True),
            sa.Column("opened_at", UtcDateTime, nullable=False),
            sa.Column("updated_at", UtcDateTime, nullable=False),
            sa.Column("resolved_at", UtcDateTime, nullable=True),
            sa.Column("state_changed_by", sa.String(NAME_LENGTH), nullable=True),
            comment="one row per alert key: its current state",
        )
        sa.Index(None, self.alerts.c.monitor, self.alerts.c.state)
        self.alert_events = table(
            "alert_events",
            sa.Column("event_id", sa.BigInteger().with_variant(sa.Integer, "sqlite"),
                      primary_key=True, autoincrement=True),
            sa.Column("alert_id", sa.BigInteger, sa.ForeignKey(self.alerts.c.alert_id),
                      nullable=False, index=True),
            sa.Column("run_id", sa.BigInteger, nullable=True),
            sa.Column("at", UtcDateTime, nullable=False),
            sa.Column("state", sa.String(20), nullable=False),
            sa.Column("severity", sa.String(20), nullable=False),
            sa.Column("actor", sa.String(NAME_LENGTH), nullable=True),
            sa.Column("message", _long_text(), nullable=True),
            comment="history of every alert: each sighting and each change of state",
        )
        self.deliveries = table(
            "deliveries",
            sa.Column("delivery_id", sa.BigInteger().with_variant(sa.Integer, "sqlite"),
                      primary_key=True, autoincrement=True),
            sa.Column("alert_id", sa.BigInteger, nullable=True),
            sa.Column("message_id", sa.String(NAME_LENGTH), nullable=True),
            sa.Column("run_id", sa.BigInteger, nullable=True),
            sa.Column("target", sa.String(NAME_LENGTH), nullable=False),
            sa.Column("idempotency_key", sa.String(NAME_LENGTH), nullable=False, unique=True),
            sa.Column("payload", SafeJson, nullable=True),
            sa.Column("attempts", sa.Integer, nullable=False),
            sa.Column("created_at", UtcDateTime, nullable=False),
            sa.Column("next_attempt_at", UtcDateTime, nullable=True),
            sa.Column("delivered_at", UtcDateTime, nullable=True),
            sa.Column("last_error", _long_text(), nullable=True),
            comment="outbox: each notification to send, until a target accepts it",
        )
        sa.Index(None, self.deliveries.c.delivered_at, self.deliveries.c.next_attempt_at)
        self.promotions = table(
            "promotions",
            sa.Column("promotion_id", sa.BigInteger().with_variant(sa.Integer, "sqlite"),
                      primary_key=True, autoincrement=True),
            name("monitor"),
            name("segment"),
            name("model"),
            name("previous_model", nullable=True),
            sa.Column("promoted_at", UtcDateTime, nullable=False),
            sa.Column("promoted_by", sa.String(NAME_LENGTH), nullable=False),
            sa.Column("reason", _long_text(), nullable=False),
            comment="which candidate was made the chosen model, by whom, when and why",
        )
        sa.Index(None, self.promotions.c.monitor, self.promotions.c.promoted_at)
        self.annotations = table(
            "annotations",
            sa.Column("annotation_id", sa.BigInteger().with_variant(sa.Integer, "sqlite"),
                      primary_key=True, autoincrement=True),
            name("monitor"),
            name("segment", nullable=True),
            sa.Column("starts_at", UtcDateTime, nullable=False),
            sa.Column("ends_at", UtcDateTime, nullable=False),
            sa.Column("note", _long_text(), nullable=False),
            sa.Column("silences_alerts", sa.Boolean, nullable=False),
            sa.Column("created_at", UtcDateTime, nullable=False),
            sa.Column("created_by", sa.String(NAME_LENGTH), nullable=False),
            comment="notes on date ranges (a holiday, a known outage); may silence alerts",
        )
        sa.Index(None, self.annotations.c.monitor, self.annotations.c.starts_at)
        self.source_files = table(
            "source_files",
            name("monitor", primary_key=True),
            # sha256 of the path: paths can be longer than any key MariaDB allows
            sa.Column("path_key", sa.String(64), primary_key=True),
            sa.Column("path", _long_text(), nullable=False),
            sa.Column("size_bytes", sa.BigInteger, nullable=False),
            sa.Column("modified_ns", sa.BigInteger, nullable=False),
            sa.Column("rows", sa.BigInteger, nullable=True),
            sa.Column("min_time", UtcDateTime, nullable=True),
            sa.Column("max_time", UtcDateTime, nullable=True),
            sa.Column("run_id", sa.BigInteger, nullable=False),
            sa.Column("seen_at", UtcDateTime, nullable=False),
            comment="Parquet file ledger of incremental monitors: files already counted",
        )

    @property
    def all(self) -> list[sa.Table]:
        """Every table, in creation order (parents before children)."""
        return list(self.metadata.sorted_tables)


def build_tables(prefix: str) -> HistoryTables:
    """The tables of a store whose table names start with ``prefix``."""
    return HistoryTables(prefix)
