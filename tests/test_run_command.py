"""Exit codes and JSON of ``regwarden run``, ``status``, ``backfill`` and ``serve``; the ETL API.

Runs are real ``run_monitor`` runs over GENERATED TEST DATA (a seeded simulated
linear process).  Exit codes are the command line's shared conventions: 0 clean,
1 alerts at or above --fail-on (or, for status, a monitor behind), 2 usage or
configuration, 3 data or source, 4 internal.
"""

from __future__ import annotations

import datetime as dt
import json

import pytest
from _schedule_fixtures import at, complete_slot, write_dataset, write_spec

import monitor
from monitor.cli import main
from monitor.runs._build import open_store
from monitor.runs.spec import load_spec
from storage.history import AlertRow

UTC = dt.UTC


@pytest.fixture
def spec_path(tmp_path):
    write_dataset(tmp_path / "data.parquet", start=at("2025-01-01"), end=at("2025-03-01"))
    return write_spec(tmp_path, cron="30 2 * * *", grace=120, fresh="7d")


def _json(capsys) -> dict:  # type: ignore[no-untyped-def]
    return json.loads(capsys.readouterr().out)


def _alert(path, severity: str) -> None:
    store = open_store(load_spec(path))
    store.record_alerts("load", [AlertRow(model="both", kind="residual_drift",
                                          severity=severity, message="planted for the test")])
    store.close()


# ----------------------------------------------------------------------------- run


def test_run_completes_then_skips_the_same_slot_and_exits_0(spec_path, capsys):
    assert main(["run", str(spec_path), "--as-of", "2025-02-01", "--format", "json"]) == 0
    data = _json(capsys)
    assert [r["status"] for r in data["runs"]] == ["completed"]
    run = data["runs"][0]
    assert run["slot_at"] == "2025-02-01T00:00:00+00:00" and run["rows_read"] == 56
    assert run["verdicts"][""]["best"] in ("both", "only_x")
    assert data["exit_code"] == 0 and data["open_alerts"] == []
    assert main(["run", str(spec_path), "--as-of", "2025-02-01"]) == 0
    assert "skipped" in capsys.readouterr().out


def test_a_run_that_fails_on_its_data_exits_3_and_records_the_reason(spec_path, capsys):
    # 2024-06-01: no rows in the window
    assert main(["run", str(spec_path), "--as-of", "2024-06-01", "--format", "json"]) == 3
    run = _json(capsys)["runs"][0]
    assert run["status"] == "failed" and run["exit_code"] == 3 and run["reason"]
    store = open_store(load_spec(spec_path))
    assert list(store.runs("load")["status"]) == ["failed"]
    store.close()


@pytest.mark.parametrize(("severity", "fail_on", "code"), [
    ("warning", "warning", 1), ("warning", "info", 1), ("warning", "critical", 0),
    ("critical", None, 0),
])
def test_fail_on_turns_open_alerts_into_exit_1(spec_path, capsys, severity, fail_on, code):
    _alert(spec_path, severity)
    args = ["run", str(spec_path), "--as-of", "2025-02-01", "--format", "json"]
    assert main(args + (["--fail-on", fail_on] if fail_on else [])) == code
    data = _json(capsys)
    assert [a["severity"] for a in data["open_alerts"]] == [severity]
    assert data["exit_code"] == code


@pytest.mark.parametrize("args", [
    ["--monitor", "nope"], ["--as-of", "yesterday-ish"], ["--fail-on", "severe"],
], ids=["unknown-monitor", "bad-date", "bad-level"])
def test_bad_usage_exits_2(spec_path, capsys, args):
    assert main(["run", str(spec_path), *args]) == 2
    assert capsys.readouterr().out == ""


def test_run_due_runs_the_slot_that_is_due_once(tmp_path, capsys):
    now = dt.datetime.now(UTC)
    write_dataset(tmp_path / "data.parquet", start=now - dt.timedelta(days=10),
                  end=now + dt.timedelta(days=1))
    path = write_spec(tmp_path, cron="0 0 * * *", grace=24 * 60, fresh="7d")
    assert main(["run", str(path), "--due", "--format", "json"]) == 0
    runs = _json(capsys)["runs"]
    midnight = now.replace(hour=0, minute=0, second=0, microsecond=0)
    assert [(r["slot_at"], r["status"]) for r in runs] == [(midnight.isoformat(), "completed")]
    assert main(["run", str(path), "--due"]) == 0
    assert "nothing was due" in capsys.readouterr().out


# ----------------------------------------------------------------------------- status


def test_status_exits_1_when_a_monitor_is_behind_and_0_when_on_time(spec_path, capsys):
    store = open_store(load_spec(spec_path))
    complete_slot(store, "load", at("2025-03-05T02:30"))
    store.close()
    assert main(["status", str(spec_path), "--at", "2025-03-06T03:00", "--format",
                 "json"]) == 0
    data = _json(capsys)
    entry = data["monitors"][0]
    assert (entry["state"], entry["is_behind"], entry["behind_seconds"]) == ("ok", False, 1800)
    assert entry["next_slot"] == "2025-03-07T02:30:00+00:00"
    assert entry["last_run"]["status"] == "completed" and data["behind"] == []
    assert main(["status", str(spec_path), "--at", "2025-03-06T10:00", "--format",
                 "json"]) == 1
    data = _json(capsys)
    assert data["behind"] == ["load"] and data["exit_code"] == 1
    assert data["monitors"][0]["oldest_pending"] == "2025-03-06T02:30:00+00:00"
    assert main(["status", str(spec_path), "--at", "2025-03-06T10:00"]) == 1
    table = capsys.readouterr().out
    assert "behind" in table and "7h 30m" in table


def test_status_fail_on_counts_open_alerts(spec_path, capsys):
    store = open_store(load_spec(spec_path))
    complete_slot(store, "load", at("2025-03-05T02:30"))
    store.close()
    _alert(spec_path, "critical")
    args = ["status", str(spec_path), "--at", "2025-03-05T03:00", "--format", "json"]
    assert main(args) == 0
    assert _json(capsys)["monitors"][0]["open_alerts"] == {"critical": 1}
    assert main([*args, "--fail-on", "critical"]) == 1


def test_status_of_a_missing_spec_exits_2(tmp_path, capsys):
    assert main(["status", str(tmp_path / "none.toml")]) == 2


# ----------------------------------------------------------------------------- backfill


def test_backfill_json_and_exit_codes(spec_path, capsys):
    args = ["backfill", str(spec_path), "--monitor", "load", "--from", "2025-02-01",
            "--to", "2025-02-03", "--format", "json"]
    assert main(args) == 0
    data = _json(capsys)
    assert (data["planned"], data["completed"], data["already_recorded"]) == (3, 3, 0)
    assert data["first_slot"] == "2025-02-01T02:30:00+00:00" and data["exit_code"] == 0
    assert main(args) == 0
    assert _json(capsys)["already_recorded"] == 3
    # nights before the data start fail on their data: exit 3, reasons listed
    assert main(["backfill", str(spec_path), "--monitor", "load", "--from", "2024-06-01",
                 "--to", "2024-06-02", "--format", "json"]) == 3
    failed = _json(capsys)
    assert failed["failed"] == 2 and len(failed["failures"]) == 2


@pytest.mark.parametrize("args", [
    ["--from", "2025-02-03", "--to", "2025-02-01"],
    ["--from", "2025-02-01", "--to", "2025-02-03", "--step", "0"],
    ["--from", "someday", "--to", "2025-02-03"],
], ids=["reversed", "step-0", "bad-date"])
def test_backfill_bad_usage_exits_2(spec_path, capsys, args):
    assert main(["backfill", str(spec_path), "--monitor", "load", *args]) == 2


def test_backfill_table_output(spec_path, capsys):
    assert main(["backfill", str(spec_path), "--monitor", "load", "--from", "2025-02-01",
                 "--to", "2025-02-02", "--progress", "never"]) == 0
    out = capsys.readouterr()
    assert "completed now" in out.out and out.err == ""


# ----------------------------------------------------------------------------- serve


def test_serve_with_no_scheduled_monitor_exits_2_before_starting(tmp_path, capsys):
    path = write_spec(tmp_path, cron=None)
    assert main(["serve", str(path)]) == 2
    assert "schedule" in capsys.readouterr().err


# ----------------------------------------------------------------------------- ETL API


def test_the_etl_api_is_exported_and_run_due_is_idempotent(spec_path):
    assert {"run_monitor", "run_due", "check_frame", "RunOutcome"} <= set(monitor.__all__)
    store = open_store(load_spec(spec_path))
    try:
        complete_slot(store, "load", at("2025-02-10T02:30"))
        outcomes = monitor.run_due(spec_path, now=at("2025-02-12T03:00"), store=store)
        assert [(o.slot_at, o.status) for o in outcomes] == [
            (at("2025-02-12T02:30"), "completed")]
        assert monitor.run_due(spec_path, now=at("2025-02-12T03:30"), store=store) == []
    finally:
        store.close()


def test_check_frame_refits_the_family_and_checks_the_chosen_model(rng):
    import numpy as np
    import pandas as pd

    n = 400  # generated test data: y depends on x and z
    frame = pd.DataFrame({"x": rng.normal(size=n), "z": rng.normal(size=n)})
    frame["y"] = 1.0 + 2.0 * frame["x"] + 0.5 * frame["z"] + rng.normal(scale=0.3, size=n)
    family = {"response": "y", "chosen": "only_x",
              "candidates": {"only_x": "y ~ x", "both": "y ~ x + z"}}
    result = monitor.check_frame(frame, family, baseline=frame.iloc[:200])
    assert result.family.verdict.best == "both" and not result.chosen_is_best
    assert result.chosen.formula == "y ~ x" and result.chosen.baseline_rows == 200
    assert {c.check for c in result.chosen.checks} >= {"jarque_bera", "breusch_pagan"}
    json.dumps(result.to_dict(), allow_nan=True)
    # the chosen model's R² equals a direct least-squares fit (numpy lstsq)
    X = np.column_stack([np.ones(n), frame["x"]])
    beta, ssr, *_ = np.linalg.lstsq(X, frame["y"], rcond=None)
    tss = float(((frame["y"] - frame["y"].mean()) ** 2).sum())
    assert result.family.fits["only_x"].r_squared == pytest.approx(1 - ssr[0] / tss, rel=1e-12)
