"""Real processes: two ``regwarden serve`` on one store, and SIGTERM in the middle of a run.

These start the command line in child processes (each waits at most a few
seconds in a bounded loop).  Runs are real ``run_monitor`` runs over a small
GENERATED TEST DATA set (a seeded simulated linear process).
"""

from __future__ import annotations

import datetime as dt
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest
import sqlalchemy as sa
from _schedule_fixtures import complete_slot, write_dataset, write_spec
from conftest import fresh_server_engine

from monitor.runs._build import open_store
from monitor.runs.schedule import slots_between
from monitor.runs.spec import load_spec

UTC = dt.UTC
STORE_VARIABLE = "REGWARDEN_SERVE_TEST_STORE"


def _minute(moment: dt.datetime) -> dt.datetime:
    return moment.replace(second=0, microsecond=0)


def _start(args: list[str], env: dict[str, str], log: Path) -> subprocess.Popen[bytes]:
    with log.open("wb") as handle:  # the child keeps its own copy of the descriptor
        return subprocess.Popen([sys.executable, *args], stdout=handle,
                                stderr=subprocess.STDOUT, env=env)


def _wait_until(condition, seconds: float) -> bool:  # type: ignore[no-untyped-def]
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(0.2)
    return condition()


def _stop(process: subprocess.Popen[bytes], seconds: float = 20) -> int:
    if process.poll() is None:
        process.send_signal(signal.SIGTERM)
    try:
        return process.wait(seconds)
    except subprocess.TimeoutExpired:
        process.kill()
        raise


@pytest.fixture(params=["sqlite", "postgresql"])
def shared_store(request: pytest.FixtureRequest, tmp_path: Path, unique_name: str):
    """(spec keywords, child environment) for a store both processes share."""
    env = dict(os.environ)
    if request.param == "sqlite":
        yield {"store": "sqlite:///history.sqlite"}, env
        return
    engine = fresh_server_engine("postgresql")
    engine.dispose()
    env[STORE_VARIABLE] = os.environ["REGWARDEN_TEST_POSTGRES_URL"]
    os.environ[STORE_VARIABLE] = env[STORE_VARIABLE]
    keywords = {"store_env": STORE_VARIABLE, "table_prefix": f"rw_{unique_name}_"}
    try:
        yield keywords, env
    finally:
        path = tmp_path / "spec.toml"
        if path.exists():
            store = open_store(load_spec(path))
            store._drop_tables()
            store.close()
        os.environ.pop(STORE_VARIABLE, None)


def test_two_serve_processes_on_one_store_record_every_slot_exactly_once(tmp_path,
                                                                         shared_store):
    keywords, env = shared_store
    now = dt.datetime.now(UTC)
    write_dataset(tmp_path / "data.parquet", start=now - dt.timedelta(days=6),
                  end=now + dt.timedelta(days=1))
    path = write_spec(tmp_path, cron="* * * * *", when_missed="run_all", grace=0,
                      fresh="2d", **keywords)
    spec = load_spec(path)
    store = open_store(spec)
    anchor = _minute(now) - dt.timedelta(minutes=8)
    complete_slot(store, "load", anchor)
    backlog = slots_between(spec.monitor("load"), anchor + dt.timedelta(seconds=1),
                            _minute(now) + dt.timedelta(seconds=1))
    assert len(backlog) == 8
    processes = [_start(["-m", "monitor.cli", "serve", str(path), "--drain-seconds", "20"],
                        env, tmp_path / f"serve-{i}.log") for i in range(2)]
    try:
        def caught_up() -> bool:
            done = store.runs("load", status="completed")
            return set(backlog) <= set(done["slot_at"].dt.to_pydatetime())
        assert _wait_until(caught_up, 60), [p.read_text() for p in tmp_path.glob("*.log")]
    finally:
        codes = [_stop(process) for process in processes]
    logs = [(tmp_path / f"serve-{i}.log").read_text() for i in range(2)]
    assert codes == [0, 0], logs
    runs = store.runs("load")
    completed = runs[runs["status"] == "completed"]
    assert not completed["slot_at"].duplicated().any()
    assert (runs["status"] == "completed").all(), runs[["slot_at", "status", "error_message"]]
    engine = store.engine
    attempts = store.tables.attempts
    with engine.connect() as connection:
        rows = connection.execute(
            sa.select(attempts.c.slot_at, sa.func.count())
            .where(attempts.c.monitor == "load", attempts.c.outcome == "completed")
            .group_by(attempts.c.slot_at)).all()
    assert all(count == 1 for _, count in rows)
    assert len(rows) >= len(backlog) + 1
    store.close()


CHILD = textwrap.dedent("""
    import sys, time
    from pathlib import Path
    import storage.history._store as store_module
    from monitor.cli import main

    marker, pause = Path(sys.argv[1]), float(sys.argv[2])

    def hold(table):
        # inside complete_run's transaction, after the run row was inserted
        if not marker.exists():
            marker.write_text(table)
            time.sleep(pause)

    store_module._between_inserts = hold
    sys.exit(main(["serve", sys.argv[3], "--drain-seconds", sys.argv[4]]))
""")


@pytest.mark.parametrize(("pause", "drain", "expected_code"), [
    ("1.0", "30", 0),     # the run under way finishes, then the process ends
    ("60", "0.5", 130),   # the run outlasts the drain time: abandoned, nothing written
], ids=["finishes", "abandoned"])
def test_sigterm_in_the_middle_of_a_run_leaves_the_history_consistent(tmp_path, pause, drain,
                                                                      expected_code):
    now = dt.datetime.now(UTC)
    write_dataset(tmp_path / "data.parquet", start=now - dt.timedelta(days=6),
                  end=now + dt.timedelta(days=1))
    path = write_spec(tmp_path, cron="* * * * *", when_missed="run_latest", grace=0,
                      fresh="2d")
    marker = tmp_path / "inside-transaction"
    process = _start(["-c", CHILD, str(marker), pause, str(path), drain], dict(os.environ),
                     tmp_path / "serve.log")
    try:
        assert _wait_until(marker.exists, 30), (tmp_path / "serve.log").read_text()
        process.send_signal(signal.SIGTERM)
        code = process.wait(40)
    finally:
        if process.poll() is None:
            process.kill()
    log = (tmp_path / "serve.log").read_text()
    assert code == expected_code, log
    store = open_store(load_spec(path))
    try:
        runs = store.runs("load")
        tables = store.tables
        with store.engine.connect() as connection:
            slots = connection.execute(sa.select(tables.slots)).mappings().all()
            metrics = connection.execute(sa.select(sa.func.count()).select_from(
                tables.metrics)).scalar()
        assert len(slots) == 1  # the loop stopped after the slot under way
        slot = slots[0]
        if expected_code == 0:
            assert slot["status"] == "completed" and list(runs["status"]) == ["completed"]
            assert metrics > 0
            return
        # abandoned: no run row, no result row; the claim waits for its lease
        assert slot["status"] == "running" and runs.empty and metrics == 0
        later = slot["lease_until"] + dt.timedelta(seconds=1)
        claim = store.claim_slot("load", slot["slot_at"], "rescuer:1", now=later)
        assert claim is not None and claim.attempt == 2
        with store.engine.connect() as connection:
            outcomes = connection.execute(
                sa.select(tables.attempts.c.attempt, tables.attempts.c.outcome)
                .order_by(tables.attempts.c.attempt)).all()
        assert [tuple(row) for row in outcomes] == [(1, "interrupted"), (2, "running")]
    finally:
        store.close()
