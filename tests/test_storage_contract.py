"""The history store's contract, run against SQLite, PostgreSQL and MariaDB.

Every test runs once per backend (``store_url`` in conftest.py).  Each test gets
its own table prefix on the shared server databases and drops only its own
tables afterwards.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import subprocess
import sys
import textwrap
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
import sqlalchemy as sa

from monitor.errors import ConfigurationError, StorageError
from storage.history import (
    SCHEMA_VERSION,
    AlertRow,
    BaselineRow,
    CheckRow,
    CoefficientRow,
    ComparisonRow,
    DeliveryRow,
    HistoryStore,
    MetricRow,
    RunRecord,
    SourceFile,
    VerdictRow,
    alert_key,
)
from storage.sources import SqlSource

PROJECT_ROOT = Path(__file__).resolve().parents[1]
UTC = dt.UTC
SLOT = dt.datetime(2031, 3, 4, 2, 0, tzinfo=UTC)
T0 = dt.datetime(2031, 3, 4, 2, 5, tzinfo=UTC)

#: monitor and column names that break naive SQL: quotes, spaces, reserved words, unicode
AWKWARD_NAMES = [
    "sales 'north'",
    'say "hello"',
    "select",
    "order by; drop table x; --",
    "Umsatz (€) – Köln 東京",
    "back\\slash `tick`",
]


@pytest.fixture
def store(store_url: str) -> Iterator[HistoryStore]:
    """An upgraded store with tables of its own (unique prefix), dropped afterwards."""
    prefix = f"rwt_{uuid.uuid4().hex[:10]}_"
    history = HistoryStore(store_url, table_prefix=prefix)
    history.upgrade()
    yield history
    history._drop_tables()
    history.close()


def _full_run(monitor: str) -> dict[str, object]:
    """One run with at least one row of every record type."""
    return {
        "run": RunRecord(window_start=dt.datetime(2031, 3, 3, tzinfo=UTC),
                         window_end=dt.datetime(2031, 3, 4, tzinfo=UTC), rows_read=1200,
                         rows_dropped=3, watermark_at=dt.datetime(2031, 3, 3, 23, 59, tzinfo=UTC),
                         started_at=T0, finished_at=T0 + dt.timedelta(seconds=9),
                         timings={"read": 1.5, "fit": 0.25}, detail={"family": "pricing"}),
        "metrics": [MetricRow("base", "r_squared", 0.81), MetricRow("base", "aic", 1520.5),
                    MetricRow("full", "r_squared", 0.84),
                    {"model": "full", "metric": "aic", "value": 1501.25}],
        "coefficients": [CoefficientRow("full", "Intercept", 3.5, 0.5, 2.52, 4.48, 0.95, 1e-12),
                         CoefficientRow("full", "price:region[T.north]", -1.25, 0.1, -1.45,
                                        -1.05, 0.95, 0.0)],
        "checks": [CheckRow("full", "durbin_watson", "pass", statistic=1.98, p_value=0.41,
                            is_exact=True, rows=1200, detail={"lags": [1, 2]}),
                   CheckRow("full", "breusch_pagan", "fail", statistic=14.2, p_value=0.003,
                            df=3, is_exact=False, sample_size=1000, rows=1200)],
        "comparisons": [ComparisonRow("full", "base", "partial_f", 12.5, 0.0004, 2, 1195,
                                      "better")],
        "verdicts": [VerdictRow("aic", "full", "base", False, 19.25, {"weights": [0.1, 0.9]})],
        "baselines": [BaselineRow("full", {"coefficients": [3.5, -1.25], "bins": [1, 5, 9]},
                                  window_start=dt.datetime(2031, 1, 1, tzinfo=UTC),
                                  window_end=dt.datetime(2031, 2, 1, tzinfo=UTC))],
        "alerts": [AlertRow("full", "heteroscedasticity", "warning",
                            "Breusch–Pagan p = 0.003 (evidence, not proof)",
                            evidence={"p_value": 0.003})],
        "deliveries": [DeliveryRow("ops-webhook", f"{monitor}/2031-03-04/bp",
                                   payload={"text": "check the residual spread"},
                                   alert_key=alert_key(monitor, "", "full",
                                                       "heteroscedasticity"))],
        "files": [SourceFile("/data/sales/day=2031-03-03/part-0.parquet", 4096, 123456789,
                             1200, dt.datetime(2031, 3, 3, tzinfo=UTC),
                             dt.datetime(2031, 3, 3, 23, 59, tzinfo=UTC))],
    }


def _record(store: HistoryStore, monitor: str, slot: dt.datetime = SLOT) -> int:
    claim = store.claim_slot(monitor, slot, "tester", now=T0)
    assert claim is not None
    parts = _full_run(monitor)
    run = parts.pop("run")
    return store.complete_run(claim, run, now=T0, **parts)  # type: ignore[arg-type]


def _count(store: HistoryStore, table: str) -> int:
    with store.engine.connect() as connection:
        return int(connection.execute(sa.select(sa.func.count()).select_from(
            getattr(store.tables, table))).scalar() or 0)


# ---------------------------------------------------------------------------- schema


def test_upgrade_records_the_version_and_is_idempotent(store: HistoryStore) -> None:
    assert store.schema_version() == SCHEMA_VERSION
    assert store.upgrade() == []
    names = set(sa.inspect(store.engine).get_table_names())
    assert {table.name for table in store.tables.all} <= names


def test_a_store_never_upgraded_asks_for_the_upgrade_command(store_url: str) -> None:
    fresh = HistoryStore(store_url, table_prefix=f"rwt_{uuid.uuid4().hex[:10]}_")
    with pytest.raises(StorageError, match="store upgrade"):
        fresh.runs()
    fresh.close()


def test_a_store_newer_than_the_package_is_refused(store: HistoryStore) -> None:
    with store.engine.begin() as connection:
        connection.execute(store.tables.schema_version.insert().values(
            version=SCHEMA_VERSION + 1, applied_at=T0, package_version="9.9",
            description="from the future"))
    newer = HistoryStore(store.engine, table_prefix=store.table_prefix)
    with pytest.raises(StorageError, match="newer than this regwarden"):
        newer.runs()


# ---------------------------------------------------------------------------- round trip


def test_every_record_type_round_trips(store: HistoryStore) -> None:
    monitor = "pricing nightly"
    run_id = _record(store, monitor)

    runs = store.runs(monitor)
    assert runs.shape[0] == 1
    row = runs.iloc[0]
    assert (row["run_id"], row["status"], row["attempt"]) == (run_id, "completed", 1)
    assert row["slot_at"] == SLOT
    assert (row["rows_read"], row["rows_dropped"]) == (1200, 3)
    assert row["watermark_at"] == dt.datetime(2031, 3, 3, 23, 59, tzinfo=UTC)
    assert row["timings"] == {"read": 1.5, "fit": 0.25}

    aic = store.metric_trend(monitor, "aic")
    assert dict(zip(aic["model"], aic["value"], strict=True)) == {"base": 1520.5,
                                                                  "full": 1501.25}
    paths = store.coefficient_paths(monitor, model="full")
    interaction = paths[paths["term"] == "price:region[T.north]"].iloc[0]
    assert (interaction["estimate"], interaction["ci_lower"], interaction["ci_upper"]) == (
        -1.25, -1.45, -1.05)
    checks = store.check_trend(monitor, "breusch_pagan")
    assert checks.iloc[0]["p_value"] == 0.003 and not checks.iloc[0]["is_exact"]
    assert checks.iloc[0]["sample_size"] == 1000
    verdicts = store.verdict_history(monitor)
    assert verdicts.iloc[0][["best_model", "chosen_model"]].tolist() == ["full", "base"]
    baseline = store.latest_baseline(monitor, "full")
    assert baseline is not None and baseline.payload == {"coefficients": [3.5, -1.25],
                                                         "bins": [1, 5, 9]}
    assert baseline.run_id == run_id
    alerts = store.alerts(monitor, state="open")
    assert alerts.iloc[0]["message"] == "Breusch–Pagan p = 0.003 (evidence, not proof)"
    assert alerts.iloc[0]["first_seen_run_id"] == run_id
    due = store.due_deliveries(now=T0)
    assert [d.target for d in due] == ["ops-webhook"]
    assert due[0].alert_id == alerts.iloc[0]["alert_id"]
    assert store.seen_files(monitor)["/data/sales/day=2031-03-03/part-0.parquet"].rows == 1200
    assert store.last_watermark(monitor) == dt.datetime(2031, 3, 3, 23, 59, tzinfo=UTC)
    with store.engine.connect() as connection:
        comparison = connection.execute(sa.select(store.tables.comparisons)).mappings().one()
    assert (comparison["test"], comparison["df2"], comparison["verdict"]) == (
        "partial_f", 1195, "better")


def test_promotions_annotations_and_outbox_round_trip(store: HistoryStore) -> None:
    monitor = "promo"
    store.record_promotion(monitor, "base", by="ana", reason="first choice", now=T0)
    store.record_promotion(monitor, "full", by="ben", reason="AIC lower for 30 nights",
                           previous_model="base", now=T0 + dt.timedelta(days=1))
    assert store.chosen_model(monitor) == "full"
    assert store.promotions(monitor)["promoted_by"].tolist() == ["ana", "ben"]
    store.add_annotation(monitor, dt.datetime(2031, 12, 24, tzinfo=UTC),
                         dt.datetime(2031, 12, 27, tzinfo=UTC), "holiday closure", by="ana",
                         silences_alerts=True)
    notes = store.annotations(monitor, start=dt.datetime(2031, 12, 26, tzinfo=UTC))
    assert notes["note"].tolist() == ["holiday closure"] and bool(notes["silences_alerts"][0])

    ids = store.enqueue_deliveries([DeliveryRow("mail", "k-1", {"subject": "run failed"})],
                                   now=T0)
    assert store.enqueue_deliveries([DeliveryRow("mail", "k-1")], now=T0) == []
    store.mark_delivery_failed(ids[0], "connection refused",
                               retry_at=T0 + dt.timedelta(minutes=5))
    assert store.due_deliveries(now=T0 + dt.timedelta(minutes=1)) == []
    (retry,) = store.due_deliveries(now=T0 + dt.timedelta(minutes=6))
    assert (retry.attempts, retry.last_error) == (1, "connection refused")
    store.mark_delivered(ids[0], now=T0 + dt.timedelta(minutes=6))
    assert store.due_deliveries(now=T0 + dt.timedelta(days=1)) == []


def test_alerts_keep_the_state_people_gave_them_and_reopen_when_resolved(
        store: HistoryStore) -> None:
    monitor = "alerting"
    seen = AlertRow("full", "drift", "critical", "residual mean moved")
    first = store.claim_slot(monitor, SLOT, "a", now=T0)
    assert first is not None
    store.complete_run(first, RunRecord(), alerts=[seen], now=T0)
    alert_id = int(store.alerts(monitor)["alert_id"][0])
    store.set_alert_state(alert_id, "acknowledged", actor="ana", note="looking", now=T0)

    second = store.claim_slot(monitor, SLOT + dt.timedelta(days=1), "a", now=T0)
    assert second is not None
    second_run = store.complete_run(second, RunRecord(), alerts=[seen], now=T0)
    current = store.alerts(monitor).iloc[0]
    assert (current["state"], current["last_seen_run_id"]) == ("acknowledged", second_run)

    store.set_alert_state(alert_id, "resolved", actor="ana", now=T0)
    third = store.claim_slot(monitor, SLOT + dt.timedelta(days=2), "a", now=T0)
    assert third is not None
    third_run = store.complete_run(third, RunRecord(), alerts=[seen], now=T0)
    current = store.alerts(monitor).iloc[0]
    assert (current["state"], current["first_seen_run_id"]) == ("open", third_run)
    assert store.alerts(monitor).shape[0] == 1
    assert store.alert_events(monitor)["state"].tolist() == [
        "open", "acknowledged", "acknowledged", "resolved", "open"]


# ---------------------------------------------------------------------------- slot ledger


def test_a_completed_slot_is_a_no_op_and_a_live_claim_blocks_others(
        store: HistoryStore) -> None:
    claim = store.claim_slot("m", SLOT, "one", now=T0)
    assert claim is not None and claim.attempt == 1
    assert store.claim_slot("m", SLOT, "two", now=T0 + dt.timedelta(minutes=5)) is None
    store.complete_run(claim, RunRecord(rows_read=5), now=T0)
    assert store.claim_slot("m", SLOT, "two", now=T0 + dt.timedelta(days=9)) is None
    assert store.slot_status("m", SLOT)["status"] == "completed"


def test_a_failed_slot_is_retried_and_every_attempt_is_kept(store: HistoryStore) -> None:
    claim = store.claim_slot("m", SLOT, "one", now=T0)
    assert claim is not None
    store.fail_run(claim, "read", "file day=2031-03-03/part-1.parquet is corrupt",
                   error_kind="source", now=T0)
    retry = store.claim_slot("m", SLOT, "two", now=T0 + dt.timedelta(minutes=1))
    assert retry is not None and retry.attempt == 2
    store.complete_run(retry, RunRecord(rows_read=7), now=T0 + dt.timedelta(minutes=2))
    runs = store.runs("m")
    assert runs[["attempt", "status"]].values.tolist() == [[1, "failed"], [2, "completed"]]
    assert runs.iloc[0]["error_step"] == "read" and "corrupt" in runs.iloc[0]["error_message"]
    assert store.metric_trend("m", "aic").empty


def test_a_stale_claim_is_taken_over_and_the_old_owner_cannot_write(
        store: HistoryStore) -> None:
    lease = dt.timedelta(minutes=30)
    old = store.claim_slot("m", SLOT, "old", lease=lease, now=T0)
    assert old is not None
    assert store.claim_slot("m", SLOT, "new", lease=lease, now=T0 + lease / 2) is None
    new = store.claim_slot("m", SLOT, "new", lease=lease, now=T0 + lease * 2)
    assert new is not None and new.attempt == 2
    with pytest.raises(StorageError, match="no longer holds the slot"):
        store.complete_run(old, RunRecord(), metrics=[MetricRow("a", "aic", 1.0)])
    assert _count(store, "metrics") == 0 and _count(store, "runs") == 0
    renewed = store.renew_claim(new, lease=lease, now=T0 + lease * 2)
    assert renewed.lease_until == T0 + lease * 3
    store.complete_run(renewed, RunRecord(), now=T0 + lease * 2)
    with store.engine.connect() as connection:
        outcomes = connection.execute(
            sa.select(store.tables.attempts.c.attempt, store.tables.attempts.c.outcome)
            .order_by(store.tables.attempts.c.attempt)).all()
    assert [tuple(row) for row in outcomes] == [(1, "interrupted"), (2, "completed")]


_CHILD_PRELUDE = textwrap.dedent("""
    import datetime as dt, os, signal, sys, time
    sys.path.insert(0, {root!r})
    from storage.history import HistoryStore, RunRecord, MetricRow
    from tests.test_storage_contract import _full_run, SLOT, T0
    import storage.history._store as store_module
    url, prefix, monitor = sys.argv[1:4]
    store = HistoryStore(url, table_prefix=prefix)
""")


def _child(code: str, *arguments: str) -> subprocess.Popen[str]:
    script = _CHILD_PRELUDE.format(root=str(PROJECT_ROOT)) + textwrap.dedent(code)
    return subprocess.Popen([sys.executable, "-c", script, *arguments], text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            stdin=subprocess.PIPE, cwd=PROJECT_ROOT)


def test_a_writer_killed_between_inserts_leaves_nothing_and_the_slot_is_rerun_once(
        store: HistoryStore, store_url: str) -> None:
    """kill -9 after the third insert of a run: none of it is visible; a retry records it once."""
    monitor = "killed 'writer'"
    writer = _child("""
        claim = store.claim_slot(monitor, SLOT, "writer-1", lease=dt.timedelta(minutes=5), now=T0)
        inserts = []
        def die_after_third(table):
            inserts.append(table)
            if len(inserts) == 3:
                os.kill(os.getpid(), signal.SIGKILL)
        store_module._between_inserts = die_after_third
        parts = _full_run(monitor)
        store.complete_run(claim, parts.pop("run"), now=T0, **parts)
        print("not killed")
    """, store_url, store.table_prefix, monitor)
    out, err = writer.communicate(timeout=60)
    assert writer.returncode == -9, (out, err)

    for table in ("runs", "metrics", "coefficients", "checks", "comparisons", "verdicts",
                  "baselines", "alerts", "alert_events", "deliveries", "source_files"):
        assert _count(store, table) == 0, table
    assert store.slot_status(monitor, SLOT)["status"] == "running"

    too_early = store.claim_slot(monitor, SLOT, "writer-2", now=T0 + dt.timedelta(minutes=1))
    assert too_early is None
    claim = store.claim_slot(monitor, SLOT, "writer-2", now=T0 + dt.timedelta(minutes=6))
    assert claim is not None and claim.attempt == 2
    parts = _full_run(monitor)
    run_id = store.complete_run(claim, parts.pop("run"), now=T0, **parts)  # type: ignore[arg-type]
    assert store.claim_slot(monitor, SLOT, "writer-3", now=T0 + dt.timedelta(days=1)) is None
    runs = store.runs(monitor)
    assert runs["run_id"].tolist() == [run_id] and runs["status"].tolist() == ["completed"]
    assert _count(store, "metrics") == len(_full_run(monitor)["metrics"])  # type: ignore[arg-type]
    assert _count(store, "alerts") == 1 and _count(store, "deliveries") == 1


def test_processes_racing_for_one_slot_record_it_once(store: HistoryStore,
                                                     store_url: str) -> None:
    monitor = "raced"
    go_file = Path(store_url.rsplit("/", 1)[-1] + f".{uuid.uuid4().hex}.go").resolve()
    go_file = PROJECT_ROOT / ".pytest_cache" / go_file.name
    go_file.parent.mkdir(exist_ok=True)
    racers = [_child("""
        store.schema_version()                      # connected and ready
        print("ready", flush=True)
        while not os.path.exists(sys.argv[4]):
            time.sleep(0.002)
        claim = store.claim_slot(monitor, SLOT, sys.argv[5])
        if claim is None:
            print("skipped")
        else:
            store.complete_run(claim, RunRecord(rows_read=1),
                               metrics=[MetricRow("m", "aic", 1.0)])
            print("recorded")
    """, store_url, store.table_prefix, monitor, str(go_file), f"racer-{index}")
        for index in range(3)]
    try:
        for racer in racers:
            assert racer.stdout is not None
            assert racer.stdout.readline().strip() == "ready"
        go_file.touch()
        results = [racer.communicate(timeout=60) for racer in racers]
    finally:
        go_file.unlink(missing_ok=True)
    outcomes = sorted(out.strip() for out, _ in results)
    assert all(racer.returncode == 0 for racer in racers), results
    assert outcomes == ["recorded", "skipped", "skipped"]
    assert store.runs(monitor).shape[0] == 1
    assert _count(store, "metrics") == 1


# ---------------------------------------------------------------------------- values


def test_non_finite_values_are_stored_as_null_even_inside_json(store: HistoryStore) -> None:
    claim = store.claim_slot("nan", SLOT, "t", now=T0)
    assert claim is not None
    store.complete_run(
        claim, RunRecord(timings={"fit": math.nan}, detail={"x": [1.0, math.inf]}),
        metrics=[MetricRow("a", "r_squared", math.nan), MetricRow("a", "aic", -math.inf)],
        coefficients=[CoefficientRow("a", "x", math.inf, math.nan)],
        checks=[CheckRow("a", "cusum", "not_applicable", statistic=math.nan,
                         detail={"bounds": [-math.inf, math.inf], "note": "too few rows"})],
        baselines=[BaselineRow("a", {"sigma": math.nan, "bins": [0.5, math.inf]})],
        now=T0)
    trend = store.metric_trend("nan", "r_squared")
    assert math.isnan(trend["value"][0])
    with store.engine.connect() as connection:
        values = connection.execute(sa.select(store.tables.metrics.c.value)).scalars().all()
        assert values == [None, None]
        tables = store.tables
        text_of = sa.cast(tables.checks.c.detail, sa.Text) \
            if store.engine.dialect.name == "postgresql" else tables.checks.c.detail
        raw = connection.execute(sa.select(text_of)).scalar()
    raw_text = raw if isinstance(raw, str) else json.dumps(raw)
    assert "NaN" not in raw_text and "Infinity" not in raw_text
    assert store.latest_baseline("nan", "a").payload == {"sigma": None, "bins": [0.5, None]}


@pytest.mark.parametrize("name", AWKWARD_NAMES, ids=range(len(AWKWARD_NAMES)))
def test_awkward_monitor_and_model_names_round_trip(store: HistoryStore, name: str) -> None:
    claim = store.claim_slot(name, SLOT, name, now=T0)
    assert claim is not None
    store.complete_run(claim, RunRecord(), metrics=[MetricRow(name, name, 1.5, segment=name)],
                       coefficients=[CoefficientRow(name, name, 2.5)], now=T0)
    assert store.metric_trend(name, name)[["monitor", "segment", "model", "value"]] \
        .values.tolist() == [[name, name, name, 1.5]]
    assert store.coefficient_paths(name, term=name)["estimate"].tolist() == [2.5]
    assert store.claim_slot(name, SLOT, "again", now=T0) is None
    assert store.claim_slot(name.upper() + "x", SLOT, "other", now=T0) is not None


def test_a_hostile_window_bound_never_reaches_sql_as_text(store: HistoryStore,
                                                          store_url: str) -> None:
    """Bounds travel as bound parameters; text or naive values are refused before any SQL."""
    table_name = f"{store.table_prefix}src 'select'"
    metadata = sa.MetaData()
    table = sa.Table(table_name, metadata, sa.Column("order", sa.DateTime),
                     sa.Column("unit price", sa.Float))
    metadata.create_all(store.engine)
    try:
        with store.engine.begin() as connection:
            connection.execute(table.insert(), [
                {"order": dt.datetime(2031, 1, day), "unit price": float(day)}
                for day in range(1, 11)])
        source = SqlSource(store_url, table=table_name, time_column="order")
        statements: list[str] = []
        sa.event.listen(source.engine, "before_cursor_execute",
                        lambda conn, cursor, statement, params, context, many:
                        statements.append(statement))
        hostile = "2031-01-01' OR '1'='1'; DROP TABLE regwarden_runs; --"
        with pytest.raises(ConfigurationError, match="must be a datetime"):
            source.scan(["unit price"], hostile)  # type: ignore[arg-type]
        with pytest.raises(ConfigurationError, match="no time zone"):
            source.scan(["unit price"], dt.datetime(2031, 1, 3))
        assert statements == []
        with pytest.raises(ConfigurationError):
            store.runs(start=hostile)  # type: ignore[arg-type]

        scan = source.scan(["unit price"], dt.datetime(2031, 1, 3, tzinfo=UTC),
                           dt.datetime(2031, 1, 6, tzinfo=UTC))
        values = [v for batch in scan for v in batch.column(0).to_pylist()]
        assert values == [3.0, 4.0, 5.0]
        assert statements and not any("2031" in statement for statement in statements)
        assert set(scan.statement.compile().params) == {"regwarden_window_start",
                                                        "regwarden_window_end"}
        source.close()
    finally:
        metadata.drop_all(store.engine)


# ---------------------------------------------------------------------------- queries, pruning


def test_trends_filter_by_model_and_time_and_verdicts_show_changes(store: HistoryStore) -> None:
    monitor = "trend"
    for day, best in enumerate(["base", "base", "full", "full", "base"]):
        claim = store.claim_slot(monitor, SLOT + dt.timedelta(days=day), "t", now=T0)
        assert claim is not None
        store.complete_run(claim, RunRecord(), now=T0, metrics=[
            MetricRow("base", "bic", 100.0 + day), MetricRow("full", "bic", 99.0 + day)],
            verdicts=[VerdictRow("bic", best, "base", best == "base")])
    full = store.metric_trend(monitor, "bic", model="full",
                              start=SLOT + dt.timedelta(days=1),
                              end=SLOT + dt.timedelta(days=3))
    assert full["value"].tolist() == [100.0, 101.0]
    assert str(full["slot_at"].dtype) == "datetime64[ns, UTC]"
    assert store.metric_trend(monitor, "bic").shape[0] == 10
    verdicts = store.verdict_history(monitor)
    assert verdicts["changed"].tolist() == [False, False, True, False, True]


def test_prune_removes_only_older_runs_of_one_monitor(store: HistoryStore) -> None:
    for day in range(4):
        for monitor in ("keep", "trim"):
            claim = store.claim_slot(monitor, SLOT + dt.timedelta(days=day), "t", now=T0)
            assert claim is not None
            store.complete_run(claim, RunRecord(), now=T0,
                               metrics=[MetricRow("a", "aic", float(day))],
                               alerts=[AlertRow("a", "drift", "warning", "moved")],
                               baselines=[BaselineRow("a", {"day": day})])
    cutoff = SLOT + dt.timedelta(days=2)
    planned = store.prune("trim", cutoff, dry_run=True)
    assert planned["runs"] == 2 and planned["metrics"] == 2
    assert store.runs("trim").shape[0] == 4
    assert store.prune("trim", cutoff) == planned
    assert store.metric_trend("trim", "aic")["value"].tolist() == [2.0, 3.0]
    assert store.runs("keep").shape[0] == 4
    assert store.alerts("trim").shape[0] == 1
    assert store.latest_baseline("trim", "a") is not None
    # a pruned slot is gone from the ledger too: it could be run again on purpose
    assert store.slot_status("trim", SLOT) is None
