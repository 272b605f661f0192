"""One monitor from spec to history rows to a delivered alert, per source kind.

Every source holds GENERATED TEST DATA (tests/_alerting_fixtures.py: a seeded
simulated linear process with a large planted change of one slope on
2030-03-03 12:00).  The monitor runs a few nights before and after the change;
an alert must open after it (never before), be written to the history store and
reach the JSON-lines target.  A failed run must become a data-problem alert that
the next completed run resolves, with a message each time.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import pandas as pd
import pytest
import sqlalchemy as sa
from _alerting_fixtures import (
    at,
    generated_rows,
    spec_text,
    write_parquet_folder,
)
from conftest import fresh_server_engine
from threadpoolctl import threadpool_limits

from monitor.runs._build import open_store
from monitor.runs.run import run_monitor
from monitor.runs.spec import load_spec

pytestmark = pytest.mark.filterwarnings(
    # scipy's ks_2samp (inside the drift checks) warns when it falls back to its
    # asymptotic p-value; not a problem of the run
    "ignore:ks_2samp:RuntimeWarning")

CHANGE = at("2030-03-03T12:00")
NIGHTS = ["2030-03-01", "2030-03-02", "2030-03-03", "2030-03-04", "2030-03-05"]
JSONL = '''
[[monitors.load.notify]]
kind = "jsonl"
path = "alerts.jsonl"
'''
#: kinds the planted slope change can raise first (sequential charts and window checks)
MODEL_KINDS = {"fit_degraded", "coefficients_unstable", "chosen_outranked",
               "residual_drift", "assumption_functional_form"}


@pytest.fixture(autouse=True)
def _one_blas_thread():
    with threadpool_limits(limits=1, user_api="blas"):
        yield


def _run_nights(spec_path: Path, nights=NIGHTS, **options):
    return [run_monitor(spec_path, "load", night, **options) for night in nights]


def _check_history_and_delivery(spec_path: Path, outcomes, *, segments=("",)) -> pd.DataFrame:
    assert [o.status for o in outcomes] == ["completed"] * len(outcomes), \
        [(o.status, o.reason) for o in outcomes]
    spec = load_spec(spec_path)
    store = open_store(spec)
    try:
        runs = store.runs("load")
        assert list(runs["status"]) == ["completed"] * len(outcomes)
        assert all(detail["spec_digest"] == spec.digest for detail in runs["detail"])
        metrics = store.metric_trend("load", "r_squared")
        assert set(metrics["model"]) == {"only_x", "both"}
        assert set(metrics["segment"]) == set(segments)
        assert not store.check_trend("load", None).empty
        alerts = store.alerts("load")
        deliveries = pd.read_sql(sa.select(store.tables.deliveries), store.engine)
    finally:
        store.close()
    # no alert before the change: the first nights are stable
    before = [o for o in outcomes if o.slot_at <= CHANGE]
    assert all(not o.alert_events for o in before), [o.alert_events for o in before]
    opened = [e for o in outcomes for e in o.alert_events if e["event"] == "opened"]
    assert opened and {e["kind"] for e in opened} <= MODEL_KINDS
    assert set(alerts["kind"]) == {e["kind"] for e in opened}
    assert set(alerts["state"]) == {"open"} and set(alerts["model"]) == {"both"}
    # every message of the outbox was delivered to the JSON-lines file, once
    lines = [json.loads(line) for line in
             (spec_path.parent / "alerts.jsonl").read_text().splitlines()]
    assert sorted(m["idempotency_key"] for m in lines) == sorted(deliveries["idempotency_key"])
    assert deliveries["delivered_at"].notna().all()
    sent = {a["alert_id"] for m in lines for a in m["alerts"]}
    assert sent == {e["alert"] for e in opened}
    assert all(m["monitor"] == "load" and "not proof" in m["notice"] for m in lines)
    return alerts


def test_parquet_folder_from_spec_to_a_delivered_alert(tmp_path: Path) -> None:
    write_parquet_folder(generated_rows(change_at=CHANGE), tmp_path / "rows")
    spec_path = tmp_path / "spec.toml"
    spec_path.write_text(spec_text('kind = "parquet"\npath = "rows"\ntime_column = "at"',
                                   notify=JSONL))
    _check_history_and_delivery(spec_path, _run_nights(spec_path))


def _sql_table(engine: sa.Engine, name: str, rows: pd.DataFrame) -> None:
    frame = rows.copy()
    if engine.dialect.name == "sqlite":
        frame["at"] = frame["at"].dt.tz_localize(None)  # naive values are read as UTC
    frame.to_sql(name, engine, index=False, if_exists="replace",
                 dtype={"at": sa.DateTime(timezone=engine.dialect.name != "sqlite")})


def test_sql_table_on_sqlite_from_spec_to_a_delivered_alert(tmp_path: Path) -> None:
    engine = sa.create_engine(f"sqlite:///{tmp_path / 'source.sqlite'}")
    _sql_table(engine, "readings", generated_rows(change_at=CHANGE))
    engine.dispose()
    spec_path = tmp_path / "spec.toml"
    spec_path.write_text(spec_text('kind = "sql"\nurl = "sqlite:///source.sqlite"\n'
                                   'table = "readings"\ntime_column = "at"', notify=JSONL))
    _check_history_and_delivery(spec_path, _run_nights(spec_path))


def test_sql_table_on_postgresql_from_spec_to_a_delivered_alert(
        tmp_path: Path, unique_name: str) -> None:
    engine = fresh_server_engine("postgresql")  # skips without the variable, fails if down
    table = f"readings_{unique_name}"
    _sql_table(engine, table, generated_rows(change_at=CHANGE))
    spec_path = tmp_path / "spec.toml"
    # the source's URL comes from the environment (the test variable itself)
    spec_path.write_text(spec_text(
        f'kind = "sql"\nurl_env = "REGWARDEN_TEST_POSTGRES_URL"\ntable = "{table}"\n'
        'time_column = "at"', notify=JSONL))
    try:
        _check_history_and_delivery(spec_path, _run_nights(spec_path))
    finally:
        with engine.begin() as connection:
            connection.execute(sa.text(f'DROP TABLE IF EXISTS "{table}"'))
        engine.dispose()


def test_a_segment_column_alerts_only_the_segment_that_changed(tmp_path: Path) -> None:
    rows = generated_rows(change_at=CHANGE, segments=("north", "south"),
                          changed_segments=("north",))
    write_parquet_folder(rows, tmp_path / "rows")
    spec_path = tmp_path / "spec.toml"
    spec_path.write_text(spec_text('kind = "parquet"\npath = "rows"\ntime_column = "at"',
                                   notify=JSONL, segment=True))
    alerts = _check_history_and_delivery(spec_path, _run_nights(spec_path),
                                         segments=("north", "south"))
    assert set(alerts["segment"]) == {"north"}


def test_a_failed_run_becomes_a_data_problem_alert_that_the_next_run_resolves(
        tmp_path: Path) -> None:
    folder = write_parquet_folder(generated_rows(), tmp_path / "rows")
    spec_path = tmp_path / "spec.toml"
    spec_path.write_text(spec_text('kind = "parquet"\npath = "rows"\ntime_column = "at"',
                                   notify=JSONL))
    first = run_monitor(spec_path, "load", "2030-03-01")
    folder.rename(tmp_path / "moved")  # the source is gone for a night
    failed = run_monitor(spec_path, "load", "2030-03-02")
    assert failed.status == "failed" and failed.step == "source" and failed.exit_code == 3
    assert [(e["event"], e["kind"], e["severity"]) for e in failed.alert_events] == [
        ("opened", "data_source_unreachable", "critical")]
    assert failed.delivery["delivered"] == 1
    (tmp_path / "moved").rename(folder)
    # the failed slot is run again and completes: the alert clears
    again = run_monitor(spec_path, "load", "2030-03-02")
    assert first.status == again.status == "completed"
    assert [(e["event"], e["kind"]) for e in again.alert_events] == [
        ("resolved", "data_source_unreachable")]
    store = open_store(load_spec(spec_path))
    try:
        runs = store.runs("load")
        alerts = store.alerts("load")
        events = store.alert_events("load")
    finally:
        store.close()
    assert list(runs["status"]) == ["completed", "failed", "completed"]
    assert runs.iloc[1]["error_step"] == "source" and "does not exist" in \
        runs.iloc[1]["error_message"]
    assert list(alerts["state"]) == ["resolved"]
    assert list(events["state"]) == ["open", "resolved"]
    lines = [json.loads(line) for line in (tmp_path / "alerts.jsonl").read_text().splitlines()]
    assert [m["alerts"][0]["event"] for m in lines] == ["opened", "resolved"]
    assert "source could not be read" in lines[0]["alerts"][0]["message"]
    assert "step source" in lines[0]["alerts"][0]["message"]
    assert lines[1]["alerts"][0]["message"].startswith("Resolved")


def test_a_promotion_restarts_the_watch_and_closes_the_old_models_alerts(
        tmp_path: Path) -> None:
    write_parquet_folder(generated_rows(change_at=CHANGE), tmp_path / "rows")
    spec_path = tmp_path / "spec.toml"
    spec_path.write_text(spec_text('kind = "parquet"\npath = "rows"\ntime_column = "at"'))
    outcomes = _run_nights(spec_path)
    assert any(o.alerts_opened for o in outcomes)
    store = open_store(load_spec(spec_path))
    store.record_promotion("load", "only_x", by="tester", reason="test",
                           now=dt.datetime(2030, 3, 5, 12, tzinfo=dt.UTC))
    store.close()
    after = run_monitor(spec_path, "load", "2030-03-06")
    assert after.status == "completed"
    store = open_store(load_spec(spec_path))
    try:
        alerts = store.alerts("load")
        detail = store.runs("load").iloc[-1]["detail"]
    finally:
        store.close()
    old = alerts[alerts["model"] == "both"]
    assert set(old["state"]) == {"resolved"}
    assert all("no longer the chosen model" in m for m in old["message"])
    watch = detail["alerting"]["watch"]
    assert [w["model"] for w in watch] == ["only_x"]
    assert "started" in detail["watch_notes"][""]


def test_the_extrapolation_p_value_bounds_the_null_rate_of_flagged_rows() -> None:
    """Generated data: the share of fresh rows outside a 90-row baseline's ranges (2 regressors)
    stays below the bound p0 = (2q + 1)/(n + 1) that the p-value uses, and the p-value of
    the expected count is large while a clear excess is small."""
    import numpy as np

    from monitor.runs.alerting import extrapolation_p_value

    rng = np.random.default_rng(90)
    n, m, q, flagged = 90, 90, 2, 0
    for _ in range(400):
        base, fresh = rng.normal(size=(n, q)), rng.normal(size=(m, q))
        outside = (fresh > base.max(axis=0)) | (fresh < base.min(axis=0))
        flagged += int(outside.any(axis=1).sum())
    bound = (2 * q + 1) / (n + 1)
    # exact expectation of the range part: at most 2q/(n + 1) = 0.044 per row
    assert flagged / (400 * m) < 2 * q / (n + 1) < bound
    assert extrapolation_p_value(5, m, n, q) > 0.3
    assert extrapolation_p_value(30, m, n, q) < 1e-8
