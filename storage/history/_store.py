"""The history store: a slot ledger and an all-or-nothing writer of runs.

One ``HistoryStore`` wraps one SQLAlchemy engine (SQLite by default, PostgreSQL
or MariaDB/MySQL on servers).  A night goes like this::

    store = HistoryStore("sqlite:///history.sqlite")
    store.upgrade()                                  # once, or from the command line
    claim = store.claim_slot("sales", slot_at, owner="host-1:4242")
    if claim is None:
        return                                       # done already, or running elsewhere
    try:
        ...                                          # read, fit, check
        store.complete_run(claim, RunRecord(...), metrics=[...], checks=[...])
    except RegwardenError as error:
        store.fail_run(claim, step="fit", reason=str(error))

``complete_run`` writes the run's row, every result row, alerts, the outbox and
the file ledger in ONE transaction, together with the slot's status: after a
crash either all of the run is there or none of it.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import logging
import os
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from importlib import metadata as importlib_metadata
from pathlib import Path
from typing import Any

import pandas as pd
import sqlalchemy as sa

from monitor.errors import ConfigurationError, StorageError
from storage._urls import redact, resolve_url, safe_url
from storage.history import _queries
from storage.history._migrations import MIGRATIONS, applied_version, record
from storage.history._records import (
    ALERT_STATES,
    AlertRow,
    BaselineRow,
    BaselineSnapshot,
    CheckRow,
    CoefficientRow,
    ComparisonRow,
    Delivery,
    DeliveryRow,
    MetricRow,
    RunRecord,
    SlotClaim,
    SourceFile,
    VerdictRow,
    alert_key,
    coerce_records,
)
from storage.history._schema import NAME_LENGTH, SCHEMA_VERSION, HistoryTables, build_tables

__all__ = ["DEFAULT_LEASE", "HistoryStore", "default_store_url"]

logger = logging.getLogger(__name__)

#: How long a claim holds a slot before another owner may take it over.
DEFAULT_LEASE = dt.timedelta(hours=2)

#: File name of the default SQLite store, created next to the monitor config.
DEFAULT_STORE_FILE = "regwarden-history.sqlite"

#: Test hook: called with the table name after each insert of ``complete_run``.
#: Tests set it in a child process to kill the writer between two inserts.
_between_inserts: Callable[[str], None] | None = None

_PREFIX_ALPHABET = set("abcdefghijklmnopqrstuvwxyz0123456789_")


def default_store_url(config_path: str | os.PathLike[str]) -> str:
    """URL of the default SQLite store: ``regwarden-history.sqlite`` beside the config."""
    folder = Path(config_path).resolve().parent
    return f"sqlite:///{folder / DEFAULT_STORE_FILE}"


def _package_version() -> str:
    try:
        return importlib_metadata.version("regwarden")
    except importlib_metadata.PackageNotFoundError:
        return "0+unknown"


def _utc(value: dt.datetime | None, *, name: str) -> dt.datetime | None:
    if value is None:
        return None
    if not isinstance(value, dt.datetime):
        raise ConfigurationError(f"{name} must be a datetime, got {type(value).__name__} "
                                 f"{value!r}", where=name,
                                 hint="pass a timezone-aware datetime (UTC)")
    if value.tzinfo is None or value.utcoffset() is None:
        raise ConfigurationError(f"{name} is a naive datetime ({value.isoformat()})",
                                 where=name,
                                 hint="pass a timezone-aware datetime, e.g. with tzinfo=UTC")
    return value.astimezone(dt.UTC)


def _now(now: dt.datetime | None) -> dt.datetime:
    return _utc(now, name="now") if now is not None else dt.datetime.now(dt.UTC)


def _check_name(value: Any, *, name: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ConfigurationError(f"{name} must be a non-empty string, got {value!r}",
                                 where=name, hint="use a short descriptive name")
    if len(value) > NAME_LENGTH or "\x00" in value:
        raise ConfigurationError(
            f"{name} {value[:40]!r}... is longer than {NAME_LENGTH} characters or holds a "
            "NUL character", where=name, hint=f"keep names under {NAME_LENGTH} characters")
    return value


def _path_key(path: str) -> str:
    return hashlib.sha256(path.encode("utf-8")).hexdigest()


def _describe_error(error: BaseException) -> str:
    original = getattr(error, "orig", None) or error
    lines = str(original).strip().splitlines()
    return f"{type(original).__name__}: {lines[0] if lines else ''}"


class HistoryStore:
    """Run ledger, results and alerts of every monitor, in SQL tables.

    Parameters
    ----------
    url_or_engine
        A SQLAlchemy URL (``sqlite:///path``, ``postgresql+psycopg://...``,
        ``mysql+pymysql://...``) or an existing ``Engine``.  Pass ``url_env``
        instead to read the URL from an environment variable (keeps passwords
        out of config files).  Passwords never appear in messages.
    url_env
        Name of the environment variable holding the URL.
    table_prefix
        Prefix of every table name (lower-case letters, digits, ``_``).  Several
        stores can share one database with different prefixes.

    Notes
    -----
    On SQLite (engines built here) the connection uses WAL journaling, a 30 s
    busy timeout, foreign keys on and ``BEGIN IMMEDIATE`` transactions, so two
    processes sharing the file wait for each other instead of failing.

    Methods raise :class:`monitor.errors.StorageError` when the database fails,
    and :class:`monitor.errors.ConfigurationError` for bad arguments.
    """

    def __init__(self, url_or_engine: str | sa.Engine | None = None, *,
                 url_env: str | None = None, table_prefix: str = "regwarden_") -> None:
        if isinstance(url_or_engine, sa.Engine):
            self._engine: sa.Engine | None = url_or_engine
            self._url: str = str(url_or_engine.url)
            self._owns_engine = False
        else:
            self._engine = None
            self._url = resolve_url(url_or_engine, url_env, what="history store")
            self._owns_engine = True
        if (not table_prefix or len(table_prefix) > 24 or table_prefix[0].isdigit()
                or not set(table_prefix) <= _PREFIX_ALPHABET):
            raise ConfigurationError(
                f"table prefix {table_prefix!r} is not allowed", where="history store",
                hint="use up to 24 lower-case letters, digits or underscores, not starting "
                     "with a digit")
        self.table_prefix = table_prefix
        self.tables: HistoryTables = build_tables(table_prefix)
        self._checked_version = False

    # ------------------------------------------------------------------ plumbing

    def __repr__(self) -> str:
        return f"HistoryStore({self.describe()!r}, table_prefix={self.table_prefix!r})"

    def describe(self) -> str:
        """The store's URL with the password hidden."""
        return safe_url(self._url)

    @property
    def engine(self) -> sa.Engine:
        """The SQLAlchemy engine (created on first use)."""
        if self._engine is None:
            self._engine = self._create_engine()
        return self._engine

    def _create_engine(self) -> sa.Engine:
        url = sa.engine.make_url(self._url)
        if url.get_backend_name() != "sqlite":
            return sa.create_engine(url, pool_pre_ping=True)
        database = url.database or ""
        if database and database != ":memory:" and not database.startswith("file:"):
            Path(database).parent.mkdir(parents=True, exist_ok=True)
        engine = sa.create_engine(url, connect_args={"timeout": 30})

        @sa.event.listens_for(engine, "connect")
        def _configure(dbapi_connection: Any, _record: Any) -> None:
            # let SQLAlchemy (not the driver) open transactions, as BEGIN IMMEDIATE
            dbapi_connection.isolation_level = None
            cursor = dbapi_connection.cursor()
            cursor.execute("PRAGMA journal_mode=WAL")
            cursor.execute("PRAGMA busy_timeout=30000")
            cursor.execute("PRAGMA foreign_keys=ON")
            cursor.close()

        @sa.event.listens_for(engine, "begin")
        def _begin_immediate(connection: sa.Connection) -> None:
            connection.exec_driver_sql("BEGIN IMMEDIATE")

        return engine

    def close(self) -> None:
        """Release the connections (only of an engine this store created)."""
        if self._engine is not None and self._owns_engine:
            self._engine.dispose()
            self._engine = None

    def __enter__(self) -> HistoryStore:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def _fail(self, action: str, error: BaseException, hint: str | None = None) -> StorageError:
        message = redact(f"{action} failed: {_describe_error(error)}", self._url)
        return StorageError(message, where=f"history store {self.describe()}",
                            hint=hint or "check that the database is reachable and writable, "
                                         "then retry")

    @contextmanager
    def _transaction(self, action: str) -> Iterator[sa.Connection]:
        self._require_current_schema()
        try:
            with self.engine.begin() as connection:
                yield connection
        except sa.exc.SQLAlchemyError as error:
            raise self._fail(action, error) from error

    @contextmanager
    def _reading(self, action: str) -> Iterator[sa.Connection]:
        self._require_current_schema()
        try:
            with self.engine.connect() as connection:
                yield connection
        except sa.exc.SQLAlchemyError as error:
            raise self._fail(action, error) from error

    def _require_current_schema(self) -> None:
        if self._checked_version:
            return
        version = self.schema_version()
        if version < SCHEMA_VERSION:
            raise StorageError(
                f"history store schema is at version {version}, this regwarden needs "
                f"{SCHEMA_VERSION}", where=f"history store {self.describe()}",
                hint="run `regwarden store upgrade` (or HistoryStore.upgrade()) first")
        if version > SCHEMA_VERSION:
            raise StorageError(
                f"history store schema is at version {version}, newer than this regwarden "
                f"understands ({SCHEMA_VERSION})", where=f"history store {self.describe()}",
                hint="upgrade the regwarden package on this machine")
        self._checked_version = True

    # ------------------------------------------------------------------ schema

    def schema_version(self) -> int:
        """The schema version recorded in the store (0 when never upgraded)."""
        try:
            with self.engine.connect() as connection:
                return applied_version(connection, self.tables)
        except sa.exc.SQLAlchemyError as error:
            raise self._fail("reading the schema version", error) from error

    def upgrade(self) -> list[int]:
        """Create the tables or bring them to the current schema version.

        Each missing migration runs in its own transaction and is recorded in
        the ``schema_version`` table.  Safe to run again (a no-op when current).

        Returns
        -------
        list of int
            The versions applied now (empty when the store was current).

        Raises
        ------
        StorageError
            When the store is newer than this package, or the database fails.
        """
        applied: list[int] = []
        try:
            self.tables.schema_version.create(self.engine, checkfirst=True)
            with self.engine.begin() as connection:
                current = applied_version(connection, self.tables)
            if current > SCHEMA_VERSION:
                self._checked_version = False
                self._require_current_schema()
            for migration in MIGRATIONS:
                if migration.version <= current:
                    continue
                with self.engine.begin() as connection:
                    if applied_version(connection, self.tables) >= migration.version:
                        continue  # another process applied it meanwhile
                    migration.apply(connection, self.tables)
                    record(connection, self.tables, migration, _package_version())
                applied.append(migration.version)
                logger.info("history store %s upgraded to schema version %d",
                            self.describe(), migration.version)
        except sa.exc.SQLAlchemyError as error:
            raise self._fail("upgrading the schema", error,
                             hint="check that the database user may create tables") from error
        self._checked_version = False
        self._require_current_schema()
        return applied

    def _drop_tables(self) -> None:
        """Drop this store's tables (those with its prefix).  For tests only."""
        self.tables.metadata.drop_all(self.engine, checkfirst=True)

    # ------------------------------------------------------------------ slot ledger

    def claim_slot(self, monitor: str, slot_at: dt.datetime, owner: str, *,
                   lease: dt.timedelta = DEFAULT_LEASE,
                   now: dt.datetime | None = None) -> SlotClaim | None:
        """Claim one scheduled slot of a monitor, or learn that it is not ours to run.

        Parameters
        ----------
        monitor, slot_at
            The ledger key: a monitor name and its scheduled instant (aware).
        owner
            Who runs it (e.g. ``"host:pid"``); kept with the attempt.
        lease
            How long the claim holds without completion, failure or renewal
            (:meth:`renew_claim`); after that another owner may take it over and
            this attempt is recorded as ``interrupted``.
        now
            The current instant (injected in tests).

        Returns
        -------
        SlotClaim or None
            ``None`` when the slot was completed already, or another owner holds
            a live lease on it.  A slot that failed or whose lease ran out is
            claimed again with the next attempt number; every attempt is kept
            in the ``attempts`` table.
        """
        monitor = _check_name(monitor, name="monitor")
        owner = _check_name(owner, name="owner")
        slot = _utc(slot_at, name="slot_at")
        assert slot is not None
        moment = _now(now)
        lease_until = moment + lease
        slots, attempts = self.tables.slots, self.tables.attempts
        key = (slots.c.monitor == monitor) & (slots.c.slot_at == slot)
        for _ in range(5):
            try:
                with self._transaction(f"claiming slot {slot.isoformat()} of {monitor!r}") as conn:
                    try:
                        with conn.begin_nested():
                            conn.execute(slots.insert().values(
                                monitor=monitor, slot_at=slot, status="running", attempts=1,
                                owner=owner, lease_until=lease_until, updated_at=moment))
                    except sa.exc.IntegrityError:
                        pass  # the slot exists: decide below whether we may take it
                    else:
                        conn.execute(attempts.insert().values(
                            monitor=monitor, slot_at=slot, attempt=1, owner=owner,
                            claimed_at=moment, outcome="running"))
                        return SlotClaim(monitor, slot, 1, owner, moment, lease_until)
                    row = conn.execute(sa.select(slots).where(key)).mappings().first()
                    if row is None:
                        continue  # pruned meanwhile: try again
                    if row["status"] == "completed":
                        return None
                    if row["status"] == "running" and row["lease_until"] > moment:
                        return None
                    attempt = int(row["attempts"]) + 1
                    taken = conn.execute(
                        slots.update()
                        .where(key, slots.c.attempts == row["attempts"],
                               slots.c.status == row["status"])
                        .values(status="running", attempts=attempt, owner=owner,
                                lease_until=lease_until, updated_at=moment))
                    if taken.rowcount != 1:
                        return None  # another owner took it over first
                    if row["status"] == "running":
                        conn.execute(
                            attempts.update()
                            .where(attempts.c.monitor == monitor, attempts.c.slot_at == slot,
                                   attempts.c.attempt == row["attempts"],
                                   attempts.c.outcome == "running")
                            .values(outcome="interrupted", ended_at=moment))
                    conn.execute(attempts.insert().values(
                        monitor=monitor, slot_at=slot, attempt=attempt, owner=owner,
                        claimed_at=moment, outcome="running"))
                    logger.info("slot %s of %r claimed by %s (attempt %d)",
                                slot.isoformat(), monitor, owner, attempt)
                    return SlotClaim(monitor, slot, attempt, owner, moment, lease_until)
            except StorageError as error:
                if not isinstance(error.__cause__, sa.exc.IntegrityError):
                    raise
                # a concurrent first claim committed between our insert and our read
        raise StorageError(f"could not claim slot {slot.isoformat()} of {monitor!r} after "
                           "5 tries", where=f"history store {self.describe()}",
                           hint="another scheduler is racing for the same slot; retry later")

    def renew_claim(self, claim: SlotClaim, *, lease: dt.timedelta = DEFAULT_LEASE,
                    now: dt.datetime | None = None) -> SlotClaim:
        """Extend a claim's lease (for runs longer than the lease).

        Raises
        ------
        StorageError
            When the claim was lost (taken over after its lease ran out).
        """
        moment = _now(now)
        with self._transaction("renewing a slot claim") as conn:
            self._fence(conn, claim, status="running", lease_until=moment + lease,
                        updated_at=moment)
        return SlotClaim(claim.monitor, claim.slot_at, claim.attempt, claim.owner,
                         claim.claimed_at, moment + lease)

    def _fence(self, conn: sa.Connection, claim: SlotClaim, **values: Any) -> None:
        slots = self.tables.slots
        result = conn.execute(
            slots.update()
            .where(slots.c.monitor == claim.monitor, slots.c.slot_at == claim.slot_at,
                   slots.c.attempts == claim.attempt, slots.c.owner == claim.owner,
                   slots.c.status == "running")
            .values(**values))
        if result.rowcount != 1:
            raise StorageError(
                f"attempt {claim.attempt} of slot {claim.slot_at.isoformat()} of monitor "
                f"{claim.monitor!r} no longer holds the slot (its lease ran out and another "
                "owner took it over, or it was finished already)",
                where=f"history store {self.describe()}",
                hint="nothing of this attempt was written; renew the claim more often or "
                     "use a longer lease")

    def slot_status(self, monitor: str, slot_at: dt.datetime) -> dict[str, Any] | None:
        """The ledger row of a slot (status, attempts, owner, lease_until, run_id)."""
        slots = self.tables.slots
        slot = _utc(slot_at, name="slot_at")
        with self._reading("reading the slot ledger") as conn:
            row = conn.execute(sa.select(slots).where(
                slots.c.monitor == monitor, slots.c.slot_at == slot)).mappings().first()
        return dict(row) if row is not None else None

    # ------------------------------------------------------------------ writing runs

    def complete_run(
        self,
        claim: SlotClaim,
        run: RunRecord | Mapping[str, Any],
        *,
        metrics: Iterable[MetricRow | Mapping[str, Any]] = (),
        coefficients: Iterable[CoefficientRow | Mapping[str, Any]] = (),
        checks: Iterable[CheckRow | Mapping[str, Any]] = (),
        comparisons: Iterable[ComparisonRow | Mapping[str, Any]] = (),
        verdicts: Iterable[VerdictRow | Mapping[str, Any]] = (),
        baselines: Iterable[BaselineRow | Mapping[str, Any]] = (),
        alerts: Iterable[AlertRow | Mapping[str, Any]] = (),
        deliveries: Iterable[DeliveryRow | Mapping[str, Any]] = (),
        files: Iterable[SourceFile | Mapping[str, Any]] = (),
        now: dt.datetime | None = None,
    ) -> int:
        """Write a whole run and mark its slot completed, in ONE transaction.

        Either every row below is stored together with the run's status, or
        (on any error or crash) nothing of the run is.

        Parameters
        ----------
        claim
            The claim from :meth:`claim_slot`; it must still hold the slot.
        run
            The run's own row.
        metrics, coefficients, checks, comparisons, verdicts, baselines
            Result rows (records or mappings with the same fields).
        alerts
            Alerts seen in this run: inserted, or updated by their stable key
            (:func:`alert_key`); every sighting is added to ``alert_events``.
        deliveries
            Notifications for the outbox (idempotency keys already present are
            skipped).
        files
            Source files read by an incremental run, added to the file ledger.

        Returns
        -------
        int
            The new ``run_id``.
        """
        run_record = coerce_records(RunRecord, [run], argument="run")[0]
        rows = {
            "metrics": coerce_records(MetricRow, metrics, argument="metrics"),
            "coefficients": coerce_records(CoefficientRow, coefficients,
                                           argument="coefficients"),
            "checks": coerce_records(CheckRow, checks, argument="checks"),
            "comparisons": coerce_records(ComparisonRow, comparisons, argument="comparisons"),
            "verdicts": coerce_records(VerdictRow, verdicts, argument="verdicts"),
            "baselines": coerce_records(BaselineRow, baselines, argument="baselines"),
        }
        alert_rows = coerce_records(AlertRow, alerts, argument="alerts")
        delivery_rows = coerce_records(DeliveryRow, deliveries, argument="deliveries")
        file_rows = coerce_records(SourceFile, files, argument="files")
        moment = _now(now)
        with self._transaction(f"recording the run of slot {claim.slot_at.isoformat()} of "
                               f"{claim.monitor!r}") as conn:
            self._fence(conn, claim, status="completed", updated_at=moment)
            run_id = self._insert_run(conn, claim, run_record, "completed", moment)
            self._insert_results(conn, claim, run_id, rows, moment)
            alert_ids = self._upsert_alerts(conn, claim.monitor, run_id, alert_rows, moment)
            self._enqueue(conn, run_id, delivery_rows, alert_ids, moment)
            self._insert_files(conn, claim.monitor, run_id, file_rows, moment)
            self._close_attempt(conn, claim, run_id, "completed", moment)
        return run_id

    def fail_run(self, claim: SlotClaim, step: str, reason: str, *,
                 run: RunRecord | Mapping[str, Any] | None = None,
                 error_kind: str | None = None,
                 alerts: Iterable[AlertRow | Mapping[str, Any]] = (),
                 deliveries: Iterable[DeliveryRow | Mapping[str, Any]] = (),
                 now: dt.datetime | None = None) -> int:
        """Record a failed attempt (with the step and reason), in one transaction.

        The slot can be claimed again later (the next attempt is numbered on).
        ``error_kind`` is the short kind of the error (``RegwardenError.kind``).
        ``alerts`` and ``deliveries`` (e.g. the data-problem alert the failure
        raises, and its messages) are written in the same transaction, as in
        :meth:`complete_run`.  Returns the ``run_id`` of the failed run's row.
        """
        run_record = (coerce_records(RunRecord, [run], argument="run")[0] if run is not None
                      else RunRecord())
        alert_rows = coerce_records(AlertRow, alerts, argument="alerts")
        delivery_rows = coerce_records(DeliveryRow, deliveries, argument="deliveries")
        moment = _now(now)
        with self._transaction(f"recording the failure of slot {claim.slot_at.isoformat()} "
                               f"of {claim.monitor!r}") as conn:
            self._fence(conn, claim, status="failed", updated_at=moment)
            run_id = self._insert_run(conn, claim, run_record, "failed", moment,
                                      error_step=step, error_kind=error_kind,
                                      error_message=reason)
            alert_ids = self._upsert_alerts(conn, claim.monitor, run_id, alert_rows, moment)
            self._enqueue(conn, run_id, delivery_rows, alert_ids, moment)
            self._close_attempt(conn, claim, run_id, "failed", moment)
        return run_id

    def _close_attempt(self, conn: sa.Connection, claim: SlotClaim, run_id: int, outcome: str,
                       moment: dt.datetime) -> None:
        """Point the slot at its run and close the claim's attempt with its outcome."""
        slots, attempts = self.tables.slots, self.tables.attempts
        conn.execute(slots.update()
                     .where(slots.c.monitor == claim.monitor, slots.c.slot_at == claim.slot_at)
                     .values(run_id=run_id))
        conn.execute(attempts.update()
                     .where(attempts.c.monitor == claim.monitor,
                            attempts.c.slot_at == claim.slot_at,
                            attempts.c.attempt == claim.attempt)
                     .values(outcome=outcome, ended_at=moment, run_id=run_id))

    def _inserted(self, table: sa.Table) -> None:
        if _between_inserts is not None:
            _between_inserts(table.name)

    def _insert_run(self, conn: sa.Connection, claim: SlotClaim, run: RunRecord, status: str,
                    moment: dt.datetime, **error: Any) -> int:
        runs = self.tables.runs
        result = conn.execute(runs.insert().values(
            monitor=claim.monitor, slot_at=claim.slot_at, attempt=claim.attempt,
            status=status, owner=claim.owner,
            window_start=_utc(run.window_start, name="run.window_start"),
            window_end=_utc(run.window_end, name="run.window_end"),
            rows_read=run.rows_read, rows_dropped=run.rows_dropped,
            watermark_at=_utc(run.watermark_at, name="run.watermark_at"),
            started_at=_utc(run.started_at, name="run.started_at") or claim.claimed_at,
            finished_at=_utc(run.finished_at, name="run.finished_at") or moment,
            timings=dict(run.timings) if run.timings is not None else None,
            detail=dict(run.detail) if run.detail is not None else None,
            package_version=_package_version(),
            **error,
        ))
        self._inserted(runs)
        primary_key = result.inserted_primary_key
        assert primary_key is not None
        return int(primary_key[0])

    def _insert_results(self, conn: sa.Connection, claim: SlotClaim, run_id: int,
                        rows: Mapping[str, Sequence[Any]], moment: dt.datetime) -> None:
        tables = self.tables
        converters: dict[str, Callable[[Any], dict[str, Any]]] = {
            "metrics": lambda r: {"segment": r.segment, "model": r.model,
                                  "metric": r.metric, "value": r.value},
            "coefficients": lambda r: {
                "segment": r.segment, "model": r.model, "term": r.term,
                "estimate": r.estimate, "std_error": r.std_error, "ci_lower": r.ci_lower,
                "ci_upper": r.ci_upper, "ci_level": r.ci_level, "p_value": r.p_value},
            "checks": lambda r: {
                "segment": r.segment, "model": r.model, "check_name": r.check,
                "statistic": r.statistic, "p_value": r.p_value, "df": r.df, "df2": r.df2,
                "verdict": r.verdict, "is_exact": r.is_exact, "sample_size": r.sample_size,
                "rows": r.rows, "detail": r.detail},
            "comparisons": lambda r: {
                "segment": r.segment, "model": r.model, "other_model": r.other_model,
                "test": r.test, "statistic": r.statistic, "p_value": r.p_value, "df": r.df,
                "df2": r.df2, "verdict": r.verdict, "detail": r.detail},
            "verdicts": lambda r: {
                "segment": r.segment, "criterion": r.criterion, "best_model": r.best_model,
                "chosen_model": r.chosen_model, "is_chosen_best": r.is_chosen_best,
                "margin": r.margin, "detail": r.detail},
            "baselines": lambda r: {
                "monitor": claim.monitor, "segment": r.segment, "model": r.model,
                "created_at": moment,
                "window_start": _utc(r.window_start, name="baseline.window_start"),
                "window_end": _utc(r.window_end, name="baseline.window_end"),
                "format_version": r.format_version, "payload": r.payload},
        }
        for name, records in rows.items():
            if not records:
                continue
            table: sa.Table = getattr(tables, name)
            values = [{"run_id": run_id, **converters[name](record)} for record in records]
            conn.execute(table.insert(), values)
            self._inserted(table)

    def _upsert_alerts(self, conn: sa.Connection, monitor: str, run_id: int | None,
                       alert_rows: Sequence[AlertRow], moment: dt.datetime) -> dict[str, int]:
        alerts, events = self.tables.alerts, self.tables.alert_events
        ids: dict[str, int] = {}
        for row in alert_rows:
            if row.state is not None and row.state not in ALERT_STATES:
                raise StorageError(f"alert state {row.state!r} is not one of {ALERT_STATES}",
                                   where=f"alert {row.kind!r} of model {row.model!r}",
                                   hint="use one of the listed states, or None")
            key = alert_key(monitor, row.segment, row.model, row.kind)
            existing = conn.execute(sa.select(alerts).where(alerts.c.alert_key == key)
                                    ).mappings().first()
            snooze = _utc(row.snooze_until, name="alert.snooze_until")
            if existing is None:
                state = row.state or "open"
                result = conn.execute(alerts.insert().values(
                    alert_key=key, monitor=monitor, segment=row.segment, model=row.model,
                    kind=row.kind, severity=row.severity, state=state, snooze_until=snooze,
                    message=row.message, evidence=row.evidence, first_seen_run_id=run_id,
                    last_seen_run_id=run_id, opened_at=moment, updated_at=moment,
                    resolved_at=moment if state == "resolved" else None))
                primary_key = result.inserted_primary_key
                assert primary_key is not None
                alert_id = int(primary_key[0])
            else:
                alert_id = int(existing["alert_id"])
                reopened = existing["state"] == "resolved" and row.state in (None, "open")
                state = row.state or ("open" if reopened else existing["state"])
                values: dict[str, Any] = {
                    "severity": row.severity, "state": state, "message": row.message,
                    "evidence": row.evidence, "last_seen_run_id": run_id,
                    "updated_at": moment}
                if row.snooze_until is not None or row.state is not None:
                    values["snooze_until"] = snooze
                if reopened:
                    values.update(opened_at=moment, first_seen_run_id=run_id,
                                  resolved_at=None, state_changed_by=None)
                if state == "resolved" and existing["state"] != "resolved":
                    values["resolved_at"] = moment
                conn.execute(alerts.update().where(alerts.c.alert_id == alert_id)
                             .values(**values))
            conn.execute(events.insert().values(
                alert_id=alert_id, run_id=run_id, at=moment, state=state,
                severity=row.severity, actor=None, message=row.message))
            ids[key] = alert_id
        if alert_rows:
            self._inserted(alerts)
        return ids

    def _enqueue(self, conn: sa.Connection, run_id: int | None,
                 delivery_rows: Sequence[DeliveryRow], alert_ids: Mapping[str, int],
                 moment: dt.datetime) -> list[int]:
        if not delivery_rows:
            return []
        deliveries, alerts = self.tables.deliveries, self.tables.alerts
        keys = [row.idempotency_key for row in delivery_rows]
        present = set(conn.execute(sa.select(deliveries.c.idempotency_key)
                                   .where(deliveries.c.idempotency_key.in_(keys))).scalars())
        created: list[int] = []
        for row in delivery_rows:
            if row.idempotency_key in present:
                continue
            present.add(row.idempotency_key)
            alert_id = None
            if row.alert_key is not None:
                alert_id = alert_ids.get(row.alert_key) or conn.execute(
                    sa.select(alerts.c.alert_id).where(alerts.c.alert_key == row.alert_key)
                ).scalar()
                if alert_id is None:
                    raise StorageError(
                        f"delivery {row.idempotency_key!r} names alert key {row.alert_key} "
                        "that is not in the store", where="deliveries",
                        hint="pass the alert in the same call, or enqueue without alert_key")
            result = conn.execute(deliveries.insert().values(
                alert_id=alert_id, message_id=row.message_id, run_id=run_id,
                target=row.target, idempotency_key=row.idempotency_key, payload=row.payload,
                attempts=0, created_at=moment,
                next_attempt_at=_utc(row.next_attempt_at, name="delivery.next_attempt_at")
                or moment))
            primary_key = result.inserted_primary_key
            assert primary_key is not None
            created.append(int(primary_key[0]))
        self._inserted(deliveries)
        return created

    def _insert_files(self, conn: sa.Connection, monitor: str, run_id: int,
                      file_rows: Sequence[SourceFile], moment: dt.datetime) -> None:
        if not file_rows:
            return
        ledger = self.tables.source_files
        conn.execute(ledger.insert(), [{
            "monitor": monitor, "path_key": _path_key(row.path), "path": row.path,
            "size_bytes": row.size_bytes, "modified_ns": row.modified_ns, "rows": row.rows,
            "min_time": _utc(row.min_time, name="file.min_time"),
            "max_time": _utc(row.max_time, name="file.max_time"),
            "run_id": run_id, "seen_at": moment} for row in file_rows])
        self._inserted(ledger)

    # ------------------------------------------------------------------ incremental ledger

    def seen_files(self, monitor: str) -> dict[str, SourceFile]:
        """The file ledger of an incremental monitor: path -> the version counted."""
        ledger = self.tables.source_files
        with self._reading("reading the file ledger") as conn:
            rows = conn.execute(sa.select(ledger).where(ledger.c.monitor == monitor)).mappings()
            return {row["path"]: SourceFile(row["path"], int(row["size_bytes"]),
                                            int(row["modified_ns"]), row["rows"],
                                            row["min_time"], row["max_time"]) for row in rows}

    def last_watermark(self, monitor: str) -> dt.datetime | None:
        """The watermark of the monitor's latest completed run (None before the first)."""
        runs = self.tables.runs
        with self._reading("reading the watermark") as conn:
            return conn.execute(
                sa.select(runs.c.watermark_at)
                .where(runs.c.monitor == monitor, runs.c.status == "completed",
                       runs.c.watermark_at.is_not(None))
                .order_by(runs.c.slot_at.desc(), runs.c.run_id.desc()).limit(1)).scalar()

    def run_before(self, monitor: str, slot_at: dt.datetime,
                   attempt: int | None = None) -> dict[str, Any] | None:
        """The finished run (completed or failed) just before a slot, as a dict, or None.

        "Before" orders runs by ``(slot_at, attempt)``: the latest earlier slot's
        last attempt, or an earlier attempt of the same slot when ``attempt`` is
        given.  The dict has the columns of the ``runs`` table (``detail`` as JSON data).
        """
        runs = self.tables.runs
        slot = _utc(slot_at, name="slot_at")
        earlier = runs.c.slot_at < slot
        if attempt is not None:
            earlier = earlier | ((runs.c.slot_at == slot) & (runs.c.attempt < attempt))
        with self._reading("reading the previous run") as conn:
            row = conn.execute(
                sa.select(runs).where(runs.c.monitor == monitor, earlier)
                .order_by(runs.c.slot_at.desc(), runs.c.attempt.desc(), runs.c.run_id.desc())
                .limit(1)).mappings().first()
        return dict(row) if row is not None else None

    # ------------------------------------------------------------------ alerts and outbox

    def record_alerts(self, monitor: str, alerts: Iterable[AlertRow | Mapping[str, Any]], *,
                      now: dt.datetime | None = None) -> dict[str, int]:
        """Insert or update alerts seen outside a run (e.g. missed scheduled runs).

        Same rules as the alerts of :meth:`complete_run` (stable key, one event
        per sighting, ``state=None`` keeps people's state), with no run id, in
        one transaction.  Returns alert key -> ``alert_id``.
        """
        rows = coerce_records(AlertRow, alerts, argument="alerts")
        monitor = _check_name(monitor, name="monitor")
        with self._transaction(f"recording alerts of {monitor!r}") as conn:
            return self._upsert_alerts(conn, monitor, None, rows, _now(now))

    def set_alert_state(self, alert_id: int, state: str, *, actor: str,
                        snooze_until: dt.datetime | None = None, note: str | None = None,
                        now: dt.datetime | None = None) -> None:
        """Acknowledge, snooze (until ``snooze_until``), resolve or reopen an alert."""
        if state not in ALERT_STATES:
            raise ConfigurationError(f"alert state {state!r} is not one of {ALERT_STATES}",
                                     where="set_alert_state", hint="use a listed state")
        if state == "snoozed" and snooze_until is None:
            raise ConfigurationError("snoozing needs snooze_until", where="set_alert_state",
                                     hint="give the instant until which the alert is quiet")
        moment = _now(now)
        alerts, events = self.tables.alerts, self.tables.alert_events
        with self._transaction(f"changing alert {alert_id}") as conn:
            current = conn.execute(sa.select(alerts.c.severity).where(
                alerts.c.alert_id == alert_id)).scalar()
            if current is None:
                raise StorageError(f"no alert with id {alert_id}", where="alerts",
                                   hint="list alerts with HistoryStore.alerts()")
            conn.execute(alerts.update().where(alerts.c.alert_id == alert_id).values(
                state=state, updated_at=moment, state_changed_by=actor,
                snooze_until=_utc(snooze_until, name="snooze_until"),
                resolved_at=moment if state == "resolved" else None))
            conn.execute(events.insert().values(alert_id=alert_id, run_id=None, at=moment,
                                                state=state, severity=current, actor=actor,
                                                message=note))

    def enqueue_deliveries(self, deliveries: Iterable[DeliveryRow | Mapping[str, Any]], *,
                           now: dt.datetime | None = None) -> list[int]:
        """Put notifications in the outbox outside a run (e.g. 'run failed' messages).

        Returns the new ``delivery_id`` values (known idempotency keys are skipped).
        """
        rows = coerce_records(DeliveryRow, deliveries, argument="deliveries")
        with self._transaction("enqueueing deliveries") as conn:
            return self._enqueue(conn, None, rows, {}, _now(now))

    def due_deliveries(self, *, now: dt.datetime | None = None,
                       limit: int = 100) -> list[Delivery]:
        """Undelivered outbox entries whose next attempt is due, oldest first."""
        deliveries = self.tables.deliveries
        moment = _now(now)
        with self._reading("reading the outbox") as conn:
            rows = conn.execute(
                sa.select(deliveries)
                .where(deliveries.c.delivered_at.is_(None),
                       deliveries.c.next_attempt_at <= moment)
                .order_by(deliveries.c.next_attempt_at, deliveries.c.delivery_id)
                .limit(limit)).mappings().all()
        return [Delivery(**{key: row[key] for key in Delivery.__dataclass_fields__})
                for row in rows]

    def mark_delivered(self, delivery_id: int, *, now: dt.datetime | None = None) -> None:
        """Note that a target accepted an outbox entry."""
        deliveries = self.tables.deliveries
        with self._transaction("marking a delivery done") as conn:
            conn.execute(deliveries.update().where(deliveries.c.delivery_id == delivery_id)
                         .values(delivered_at=_now(now), attempts=deliveries.c.attempts + 1,
                                 last_error=None))

    def mark_delivery_failed(self, delivery_id: int, error: str, *,
                             retry_at: dt.datetime | None) -> None:
        """Note a failed attempt; ``retry_at=None`` gives up (kept, never retried)."""
        deliveries = self.tables.deliveries
        with self._transaction("recording a failed delivery") as conn:
            conn.execute(deliveries.update().where(deliveries.c.delivery_id == delivery_id)
                         .values(attempts=deliveries.c.attempts + 1, last_error=error,
                                 next_attempt_at=_utc(retry_at, name="retry_at")))

    # ------------------------------------------------------------------ promotions, notes

    def record_promotion(self, monitor: str, model: str, *, by: str, reason: str,
                         segment: str = "", previous_model: str | None = None,
                         now: dt.datetime | None = None) -> int:
        """Record that ``model`` became the chosen model of a monitor (who, when, why)."""
        promotions = self.tables.promotions
        with self._transaction("recording a promotion") as conn:
            result = conn.execute(promotions.insert().values(
                monitor=_check_name(monitor, name="monitor"),
                segment=segment, model=_check_name(model, name="model"),
                previous_model=previous_model, promoted_at=_now(now),
                promoted_by=_check_name(by, name="by"), reason=reason))
            primary_key = result.inserted_primary_key
            assert primary_key is not None
            return int(primary_key[0])

    def chosen_model(self, monitor: str, segment: str = "") -> str | None:
        """The model of the latest promotion, or None when there was none."""
        promotions = self.tables.promotions
        with self._reading("reading promotions") as conn:
            return conn.execute(
                sa.select(promotions.c.model)
                .where(promotions.c.monitor == monitor, promotions.c.segment == segment)
                .order_by(promotions.c.promoted_at.desc(), promotions.c.promotion_id.desc())
                .limit(1)).scalar()

    def add_annotation(self, monitor: str, starts_at: dt.datetime, ends_at: dt.datetime,
                       note: str, *, by: str, silences_alerts: bool = False,
                       segment: str | None = None, now: dt.datetime | None = None) -> int:
        """Attach a note to ``[starts_at, ends_at)``; optionally silence alerts in it."""
        start = _utc(starts_at, name="starts_at")
        end = _utc(ends_at, name="ends_at")
        assert start is not None and end is not None
        if end <= start:
            raise ConfigurationError(f"annotation ends ({end.isoformat()}) before it starts "
                                     f"({start.isoformat()})", where="add_annotation",
                                     hint="swap the two instants")
        annotations = self.tables.annotations
        with self._transaction("adding an annotation") as conn:
            result = conn.execute(annotations.insert().values(
                monitor=_check_name(monitor, name="monitor"), segment=segment,
                starts_at=start, ends_at=end, note=note, silences_alerts=silences_alerts,
                created_at=_now(now), created_by=_check_name(by, name="by")))
            primary_key = result.inserted_primary_key
            assert primary_key is not None
            return int(primary_key[0])

    def latest_baseline(self, monitor: str, model: str,
                        segment: str = "") -> BaselineSnapshot | None:
        """The newest baseline stored for a model of a monitor, or None."""
        baselines = self.tables.baselines
        with self._reading("reading baselines") as conn:
            row = conn.execute(
                sa.select(baselines)
                .where(baselines.c.monitor == monitor, baselines.c.model == model,
                       baselines.c.segment == segment)
                .order_by(baselines.c.created_at.desc(), baselines.c.baseline_id.desc())
                .limit(1)).mappings().first()
        if row is None:
            return None
        return BaselineSnapshot(**{key: row[key] for key in BaselineSnapshot.__dataclass_fields__})

    # ------------------------------------------------------------------ pruning

    def prune(self, monitor: str, before: dt.datetime, *,
              dry_run: bool = False) -> dict[str, int]:
        """Delete the runs of ``monitor`` whose slot is before ``before``, with their rows.

        Deletes, for those runs: results (metrics, coefficients, checks,
        comparisons, verdicts), the runs, their attempts and slot-ledger rows,
        and delivered outbox entries created before ``before``.  Keeps alerts
        and their events, baselines, promotions, annotations and the file ledger
        (forgetting a file would make an incremental monitor count it again).

        Returns the number of rows per table (that would be) deleted.
        """
        cutoff = _utc(before, name="before")
        tables = self.tables
        counts: dict[str, int] = {}
        with self._transaction(f"pruning {monitor!r}") as conn:
            run_ids = sa.select(tables.runs.c.run_id).where(
                tables.runs.c.monitor == monitor, tables.runs.c.slot_at < cutoff)
            # MariaDB refuses a subquery on the table being deleted from: materialise ids
            ids = list(conn.execute(run_ids).scalars())
            plan: list[tuple[sa.Table, Any]] = []
            for name in ("metrics", "coefficients", "checks", "comparisons", "verdicts"):
                table = getattr(tables, name)
                plan.append((table, table.c.run_id.in_(ids)))
            plan.append((tables.runs, tables.runs.c.run_id.in_(ids)))
            plan.append((tables.attempts, (tables.attempts.c.monitor == monitor)
                         & (tables.attempts.c.slot_at < cutoff)))
            plan.append((tables.slots, (tables.slots.c.monitor == monitor)
                         & (tables.slots.c.slot_at < cutoff)))
            plan.append((tables.deliveries, tables.deliveries.c.run_id.in_(ids)
                         & tables.deliveries.c.delivered_at.is_not(None)))
            for table, condition in plan:
                name = table.name[len(self.table_prefix):]
                counts[name] = int(conn.execute(
                    sa.select(sa.func.count()).select_from(table).where(condition)).scalar()
                    or 0)
                if not dry_run and counts[name]:
                    conn.execute(table.delete().where(condition))
        logger.info("pruned %r before %s: %s%s", monitor, cutoff.isoformat(), counts,
                    " (dry run)" if dry_run else "")
        return counts

    # ------------------------------------------------------------------ queries

    def runs(self, monitor: str | None = None, *, start: dt.datetime | None = None,
             end: dt.datetime | None = None, status: str | None = None) -> pd.DataFrame:
        """Runs (one row per finished attempt), oldest slot first.  See ``_queries``."""
        with self._reading("querying runs") as conn:
            return _queries.runs(conn, self.tables, monitor, start=_utc(start, name="start"),
                                 end=_utc(end, name="end"), status=status)

    def metric_trend(self, monitor: str, metric: str, *, model: str | None = None,
                     segment: str | None = None, start: dt.datetime | None = None,
                     end: dt.datetime | None = None) -> pd.DataFrame:
        """One metric over completed runs, for one model or all candidates."""
        with self._reading("querying a metric trend") as conn:
            return _queries.metric_trend(conn, self.tables, monitor, metric, model=model,
                                         segment=segment, start=_utc(start, name="start"),
                                         end=_utc(end, name="end"))

    def check_trend(self, monitor: str, check: str | None, *, model: str | None = None,
                    segment: str | None = None, start: dt.datetime | None = None,
                    end: dt.datetime | None = None, with_detail: bool = False) -> pd.DataFrame:
        """One check's (``check=None``: every check's) statistic, p-value and verdict over
        completed runs; ``with_detail`` adds the ``detail`` JSON column."""
        with self._reading("querying a check trend") as conn:
            return _queries.check_trend(conn, self.tables, monitor, check, model=model,
                                        segment=segment, start=_utc(start, name="start"),
                                        end=_utc(end, name="end"), with_detail=with_detail)

    def coefficient_paths(self, monitor: str, *, model: str | None = None,
                          term: str | None = None, segment: str | None = None,
                          start: dt.datetime | None = None,
                          end: dt.datetime | None = None) -> pd.DataFrame:
        """Coefficient estimates with their confidence bounds over completed runs."""
        with self._reading("querying coefficient paths") as conn:
            return _queries.coefficient_paths(conn, self.tables, monitor, model=model,
                                              term=term, segment=segment,
                                              start=_utc(start, name="start"),
                                              end=_utc(end, name="end"))

    def verdict_history(self, monitor: str, *, criterion: str | None = None,
                        segment: str | None = None, start: dt.datetime | None = None,
                        end: dt.datetime | None = None,
                        with_detail: bool = False) -> pd.DataFrame:
        """Which model was best in each run, and where that changed; ``with_detail`` adds
        the ``detail`` JSON column (the family verdict, with its one-sentence summary)."""
        with self._reading("querying verdicts") as conn:
            return _queries.verdict_history(conn, self.tables, monitor, criterion=criterion,
                                            segment=segment, start=_utc(start, name="start"),
                                            end=_utc(end, name="end"), with_detail=with_detail)

    def alerts(self, monitor: str | None = None, *, state: str | Sequence[str] | None = None,
               model: str | None = None, start: dt.datetime | None = None,
               end: dt.datetime | None = None) -> pd.DataFrame:
        """Alerts (current state per key); ``state="open"`` lists the open ones."""
        with self._reading("querying alerts") as conn:
            return _queries.alerts(conn, self.tables, monitor, state=state, model=model,
                                   start=_utc(start, name="start"), end=_utc(end, name="end"))

    def alert_events(self, monitor: str | None = None, *, model: str | None = None,
                     start: dt.datetime | None = None,
                     end: dt.datetime | None = None) -> pd.DataFrame:
        """Every sighting and change of state of alerts, oldest first."""
        with self._reading("querying alert events") as conn:
            return _queries.alert_events(conn, self.tables, monitor, model=model,
                                         start=_utc(start, name="start"),
                                         end=_utc(end, name="end"))

    def annotations(self, monitor: str, *, start: dt.datetime | None = None,
                    end: dt.datetime | None = None) -> pd.DataFrame:
        """Annotations of a monitor overlapping ``[start, end)``."""
        with self._reading("querying annotations") as conn:
            return _queries.annotations(conn, self.tables, monitor,
                                        start=_utc(start, name="start"),
                                        end=_utc(end, name="end"))

    def promotions(self, monitor: str) -> pd.DataFrame:
        """Promotions of a monitor, oldest first."""
        with self._reading("querying promotions") as conn:
            return _queries.promotions(conn, self.tables, monitor)
