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


# ----------------------------------------------------------------------------- alerts, checks,
# notification targets and delivery


def _with_section(name: str, value: object) -> dict:
    data = copy.deepcopy(GOOD)
    data["monitors"]["north"][name] = value
    return data


def test_alert_and_check_defaults_are_the_policy_and_check_options_defaults() -> None:
    from monitor.runs.alerting import check_options, policy_of
    from monitor.runs.policy import AlertPolicy
    from monitor.stats.residual_pass import CheckOptions

    north = parse_spec(GOOD).monitor("north")
    assert policy_of(north.alerts) == AlertPolicy()
    assert check_options(north.checks) == CheckOptions()
    assert north.notify == ()


def test_alert_check_notify_and_delivery_keys_parse(tmp_path: Path) -> None:
    data = copy.deepcopy(GOOD)
    north = data["monitors"]["north"]
    north["alerts"] = {"open_after_runs": 2, "out_of_last_runs": 3, "clear_after_clean_runs": 4,
                       "nights_between_false_alarms": 400, "false_discovery_rate": 0.01,
                       "min_rows": 50, "max_dropped_share": 0.25, "rows_per_night": 24,
                       "sequential_watch": False}
    north["checks"] = {"quiet": ["white", "vif"], "sample_size": 2000, "lags": 7}
    north["notify"] = [
        {"kind": "log"},
        {"kind": "jsonl", "path": "out/alerts.jsonl", "min_severity": "warning"},
        {"kind": "webhook", "url_env": "HOOK_URL", "secret_env": "HOOK_KEY"},
        {"kind": "email", "host": "mail.invalid", "port": 465, "security": "ssl",
         "sender": "rw@example.org", "recipients": ["a@example.org"],
         "username_env": "SMTP_USER", "password_env": "SMTP_PASSWORD"},
        {"kind": "callable", "name": "etl", "function": "my_jobs.alerts:receive"},
    ]
    north["delivery"] = {"tries_per_pass": 5, "pause_seconds": 0}
    monitor = parse_spec(data, path=tmp_path / "spec.toml").monitor("north")
    from monitor.runs.alerting import check_options, policy_of

    policy = policy_of(monitor.alerts)
    assert (policy.window_persistence.open_after_runs, policy.window_persistence.out_of_last_runs,
            policy.window_persistence.clear_after_clean_runs) == (2, 3, 4)
    assert policy.nights_between_false_alarms == 400 and policy.false_discovery_rate == 0.01
    assert monitor.alerts.rows_per_night == 24 and not monitor.alerts.sequential_watch
    assert check_options(monitor.checks).lags == 7 and monitor.checks.quiet == ("white", "vif")
    assert [t.name for t in monitor.notify] == ["log", "jsonl", "webhook", "email", "etl"]
    assert [t.min_severity for t in monitor.notify] == ["info", "warning", "info", "warning",
                                                        "info"]
    assert monitor.notify[1].path == tmp_path / "out" / "alerts.jsonl"
    assert monitor.notify[3].recipients == ("a@example.org",)
    assert monitor.delivery.tries_per_pass == 5 and monitor.delivery.pause_seconds == 0


@pytest.mark.parametrize(
    ("section", "value", "key_path"),
    [
        ("alerts", {"open_after_runs": 7, "out_of_last_runs": 6},
         "monitors.north.alerts.open_after_runs"),
        ("alerts", {"false_discovery_rate": 0}, "monitors.north.alerts.false_discovery_rate"),
        ("alerts", {"min_rows": "many"}, "monitors.north.alerts.min_rows"),
        ("alerts", {"persist": 3}, "monitors.north.alerts.persist"),
        ("alerts", {"highest_window_severity": "urgent"},
         "monitors.north.alerts.highest_window_severity"),
        ("checks", {"quiet": ["whit"]}, "monitors.north.checks.quiet[0]"),
        ("checks", {"fail_level": 0.1}, "monitors.north.checks.fail_level"),
        ("notify", [{"kind": "pager"}], "monitors.north.notify[0].kind"),
        ("notify", [{"kind": "log"}, {"kind": "log"}], "monitors.north.notify[1].name"),
        ("notify", [{"kind": "jsonl"}], "monitors.north.notify[0].path"),
        ("notify", [{"kind": "webhook", "url": "https://h", "url_env": "H"}],
         "monitors.north.notify[0]"),
        ("notify", [{"kind": "webhook", "url": "ftp://h"}], "monitors.north.notify[0].url"),
        ("notify", [{"kind": "webhook", "url_env": "not a name"}],
         "monitors.north.notify[0].url_env"),
        ("notify", [{"kind": "email", "host": "h", "sender": "s@x", "recipients": ["nobody"]}],
         "monitors.north.notify[0].recipients[0]"),
        ("notify", [{"kind": "email", "host": "h", "sender": "s@x", "recipients": ["a@x"],
                     "security": "tls"}], "monitors.north.notify[0].security"),
        ("notify", [{"kind": "callable", "function": "no colon"}],
         "monitors.north.notify[0].function"),
        ("notify", [{"kind": "log", "password": "x"}], "monitors.north.notify[0].password"),
        ("notify", {"kind": "log"}, "monitors.north.notify"),
        ("delivery", {"tries_per_pass": 0}, "monitors.north.delivery.tries_per_pass"),
    ],
    ids=["open after more than out of", "zero rate", "wrong type", "unknown alerts key",
         "severity", "unknown check", "fail above warn", "notify kind", "duplicate target",
         "jsonl path", "url and url_env", "url scheme", "env name", "recipient", "security",
         "function", "unknown target key", "notify not a list", "tries"],
)
def test_each_mistake_in_alerts_checks_notify_and_delivery_names_its_key_path(
        section: str, value: object, key_path: str) -> None:
    with pytest.raises(ConfigurationError) as caught:
        parse_spec(_with_section(section, value))
    assert caught.value.where == key_path
    assert caught.value.exit_code == 2 and caught.value.hint


BAD_SPECS = {
    "unknown key": ("[monitors.plant.alerts]\nopen_after = 3\n", "monitors.plant.alerts"),
    "wrong type": ("[monitors.plant.checks]\nlags = \"ten\"\n", "monitors.plant.checks.lags"),
    "unknown chosen model": None,
    "bad cron": ("[monitors.plant.schedule]\ncron = \"30 25 * * *\"\n",
                 "monitors.plant.schedule.cron"),
}


@pytest.mark.parametrize("mistake", ["unknown key", "wrong type", "unknown chosen model",
                                     "bad cron", "unreachable store"])
def test_run_with_a_bad_spec_exits_2_names_the_key_and_writes_nothing(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], mistake: str) -> None:
    text = (Path(__file__).parent / "data" / "spec_minimal.toml").read_text()
    if mistake == "unknown chosen model":
        text, key = text.replace('chosen = "small"', 'chosen = "medium"'), \
            "monitors.plant.family.chosen"
    elif mistake == "unreachable store":
        text, key = text.replace('store = "sqlite:///history.sqlite"',
                                 'store = "postgresql+psycopg://nobody@127.0.0.1:1/none"'), \
            "history.store"
    else:
        addition, key = BAD_SPECS[mistake]
        text += addition
    (tmp_path / "spec.toml").write_text(text)
    assert main(["run", str(tmp_path / "spec.toml"), "--as-of", "2030-03-01"]) == 2
    err = capsys.readouterr().err
    assert key in err and "Traceback" not in err
    assert not (tmp_path / "history.sqlite").exists()
