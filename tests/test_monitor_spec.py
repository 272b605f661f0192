"""The monitor spec: parsed once, every mistake named by its key path, exit code 2."""

from __future__ import annotations

import copy
import datetime as dt
from pathlib import Path

import pytest

from monitor.cli import main
from monitor.errors import ConfigurationError
from monitor.runs.spec import load_spec, parse_duration, parse_spec

GOOD = {
    "history": {"store": "sqlite:///history.sqlite"},
    "monitors": {
        "north": {
            "segment_column": "substation",
            "source": {"kind": "parquet", "path": "readings", "time_column": "reading_date"},
            "windows": {"fresh": "90d"},
            "family": {
                "response": "y",
                "chosen": "b",
                "candidates": {"a": "y ~ x", "b": "y ~ x + z"},
            },
            "schedule": {"cron": "30 2 * * *", "timezone": "Europe/Oslo"},
        }
    },
}


def with_change(path: list[str], value: object) -> dict:
    data = copy.deepcopy(GOOD)
    target = data
    for key in path[:-1]:
        target = target[key]
    target[path[-1]] = value
    return data


def test_a_good_spec_parses_into_typed_settings(tmp_path: Path) -> None:
    spec = parse_spec(GOOD, path=tmp_path / "spec.toml")
    north = spec.monitor("north")
    assert north.windows.fresh == dt.timedelta(days=90)
    assert north.family.criterion == "aic" and north.family.margin == 2.0
    assert north.source.path == tmp_path / "readings"
    assert spec.store_url == f"sqlite:///{tmp_path / 'history.sqlite'}"
    assert len(spec.digest) == 64


@pytest.mark.parametrize(
    ("path", "value", "key_path"),
    [
        (["monitors", "north", "colour"], "blue", "monitors.north.colour"),
        (["monitors", "north", "windows", "fresh"], 90, "monitors.north.windows.fresh"),
        (["monitors", "north", "family", "chosen"], "zz", "monitors.north.family.chosen"),
        (["monitors", "north", "schedule", "cron"], "61 2 * * *", "monitors.north.schedule.cron"),
        (["monitors", "north", "schedule", "cron"], "30 2 * *", "monitors.north.schedule.cron"),
        (["monitors", "north", "schedule", "timezone"], "Mars/Base",
         "monitors.north.schedule.timezone"),
        (["monitors", "north", "family", "criterion"], "r2", "monitors.north.family.criterion"),
        (["monitors", "north", "family", "candidates", "c"], "q ~ x",
         "monitors.north.family.candidates.c"),
        (["monitors", "north", "family", "candidates", "d"], "y ~ x +",
         "monitors.north.family.candidates.d"),
        (["monitors", "north", "source", "kind"], "excel", "monitors.north.source.kind"),
    ],
    ids=["unknown key", "wrong type", "unknown chosen", "bad cron value", "cron fields",
         "time zone", "criterion", "other response", "bad formula", "source kind"],
)
def test_each_mistake_names_its_key_path(path: list[str], value: object, key_path: str) -> None:
    with pytest.raises(ConfigurationError) as caught:
        parse_spec(with_change(path, value))
    assert caught.value.where == key_path
    assert caught.value.exit_code == 2
    assert caught.value.hint


def test_durations_accept_days_weeks_hours_only() -> None:
    assert parse_duration("12w", "x") == dt.timedelta(weeks=12)
    assert parse_duration("36h", "x") == dt.timedelta(hours=36)
    with pytest.raises(ConfigurationError, match="positive duration"):
        parse_duration("0d", "x")
    with pytest.raises(ConfigurationError, match="positive duration"):
        parse_duration("3 months", "x")


def test_validate_command_exits_2_on_a_bad_spec_and_writes_nothing(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    spec = tmp_path / "spec.toml"
    spec.write_text('[history]\nstore = "sqlite:///h.sqlite"\n[monitors.a]\nsource = 3\n')
    assert main(["validate", str(spec)]) == 2
    err = capsys.readouterr().err
    assert "monitors.a.source" in err and "Traceback" not in err
    assert not (tmp_path / "h.sqlite").exists()


def test_validate_reports_an_unreachable_store_with_exit_2(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    spec = tmp_path / "spec.toml"
    text = (Path(__file__).parent / "data" / "spec_minimal.toml").read_text()
    spec.write_text(text.replace('store = "sqlite:///history.sqlite"',
                                 'store = "postgresql+psycopg://nobody@127.0.0.1:1/none"'))
    assert main(["validate", str(spec)]) == 2
    assert "history" in capsys.readouterr().err


def test_validate_offline_accepts_a_good_file(tmp_path: Path,
                                              capsys: pytest.CaptureFixture[str]) -> None:
    spec = tmp_path / "spec.toml"
    spec.write_text((Path(__file__).parent / "data" / "spec_minimal.toml").read_text())
    assert main(["validate", str(spec), "--offline", "--format", "json"]) == 0
    assert '"monitors"' in capsys.readouterr().out


def test_a_missing_spec_file_is_a_usage_error(tmp_path: Path) -> None:
    with pytest.raises(ConfigurationError, match="no spec file"):
        load_spec(tmp_path / "absent.toml")
