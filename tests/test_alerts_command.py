"""``regwarden alerts``: list, acknowledge, snooze; what people do survives the next runs.

Alerts come from real runs over GENERATED TEST DATA (tests/_alerting_fixtures.py):
the Parquet folder is moved away for some nights, so each of those runs fails with
an unreachable source, a critical data-problem alert.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import pytest
from _alerting_fixtures import generated_rows, spec_text, write_parquet_folder
from threadpoolctl import threadpool_limits

from monitor.cli import main
from monitor.runs._build import open_store
from monitor.runs.run import run_as_user, run_monitor
from monitor.runs.spec import load_spec

pytestmark = pytest.mark.filterwarnings("ignore:ks_2samp:RuntimeWarning")


@pytest.fixture(autouse=True)
def _one_blas_thread():
    with threadpool_limits(limits=1, user_api="blas"):
        yield


@pytest.fixture
def setup(tmp_path: Path):
    folder = write_parquet_folder(generated_rows(), tmp_path / "rows")
    path = tmp_path / "spec.toml"
    path.write_text(spec_text('kind = "parquet"\npath = "rows"\ntime_column = "at"'))
    assert run_monitor(path, "load", "2030-03-01").status == "completed"
    folder.rename(tmp_path / "away")
    failed = run_monitor(path, "load", "2030-03-02")
    assert failed.alert_events[0]["kind"] == "data_source_unreachable"
    return path, folder, tmp_path / "away"


def _listed(capsys, *args: str) -> list[dict]:
    capsys.readouterr()
    assert main(["alerts", *args, "--format", "json"]) == 0
    return json.loads(capsys.readouterr().out)["alerts"]


def test_the_list_shows_active_alerts_with_their_message(setup, capsys) -> None:
    path, _, _ = setup
    assert main(["alerts", str(path)]) == 0
    table = capsys.readouterr().out
    assert "data_source_unreachable" in table and "critical" in table and "open" in table
    assert "the source could not be read" in table
    [alert] = _listed(capsys, str(path))
    assert alert["state"] == "open" and alert["monitor"] == "load"
    assert alert["evidence"]["subject"] == "step source"
    assert _listed(capsys, str(path), "--state", "resolved") == []


def test_an_acknowledgement_is_kept_by_later_runs_until_the_alert_clears(setup, capsys) -> None:
    path, folder, away = setup
    [alert] = _listed(capsys, str(path))
    assert main(["alerts", str(path), "--ack", str(alert["alert_id"])]) == 0
    assert f"acknowledged by {run_as_user()}" in capsys.readouterr().out
    # still failing: the alert is seen again and stays acknowledged, no new message
    again = run_monitor(path, "load", "2030-03-03")
    assert again.status == "failed" and again.alert_events == ()
    [alert] = _listed(capsys, str(path))
    assert alert["state"] == "acknowledged" and alert["changed_by"] == run_as_user()
    away.rename(folder)
    cleared = run_monitor(path, "load", "2030-03-03")
    assert [e["event"] for e in cleared.alert_events] == ["resolved"]
    assert _listed(capsys, str(path)) == []
    assert [a["state"] for a in _listed(capsys, str(path), "--state", "all")] == ["resolved"]
    # a resolved alert cannot be acknowledged: exit 2 with the option named
    assert main(["alerts", str(path), "--ack", str(alert["alert_id"])]) == 2
    assert "--ack" in capsys.readouterr().err


def test_a_snooze_silences_until_its_end_then_the_alert_is_announced_again(setup,
                                                                          capsys) -> None:
    path, _, _ = setup
    [alert] = _listed(capsys, str(path))
    until = (dt.datetime.now(dt.UTC) + dt.timedelta(days=2)).replace(microsecond=0)
    assert main(["alerts", str(path), "--snooze", str(alert["alert_id"]),
                 "--until", until.isoformat()]) == 0
    [snoozed] = _listed(capsys, str(path), "--state", "snoozed")
    assert dt.datetime.fromisoformat(snoozed["snooze_until"]) == until
    quiet = run_monitor(path, "load", "2030-03-03")
    assert quiet.alert_events == ()
    assert _listed(capsys, str(path))[0]["state"] == "snoozed"
    # a run after the snooze's end, with the source still gone: reminded, open again
    later = run_monitor(path, "load", "2030-03-04", now=until + dt.timedelta(hours=1))
    assert [e["event"] for e in later.alert_events] == ["reminder"]
    assert _listed(capsys, str(path))[0]["state"] == "open"
    store = open_store(load_spec(path))
    events = store.alert_events("load")
    store.close()
    assert list(events["state"]) == ["open", "snoozed", "snoozed", "open"]
    assert events.iloc[1]["actor"] == run_as_user()


@pytest.mark.parametrize(("args", "where"), [
    (["--ack", "999"], "--ack"),
    (["--snooze", "1"], "--until"),
    (["--snooze", "1", "--until", "2001-01-01"], "--until"),
    (["--until", "2099-01-01"], "--until"),
    (["--monitor", "nope"], "--monitor"),
], ids=["unknown id", "snooze without end", "snooze into the past", "until alone",
        "unknown monitor"])
def test_mistakes_exit_2_and_name_the_option(setup, capsys, args, where) -> None:
    path, _, _ = setup
    assert main(["alerts", str(path), *args]) == 2
    assert where in capsys.readouterr().err
