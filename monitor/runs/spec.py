"""The monitor spec: a TOML file parsed once into frozen dataclasses, validated with key paths.

Shape (every key is ours; ``[…]`` optional)::

    [history]
    store = "sqlite:///history.sqlite"   # or store_env = "VAR" holding the URL;
                                         # default: history.sqlite next to the spec file
    [table_prefix = "regwarden_"]

    [monitors.NAME]
    [description = "..."]
    [segment_column = "substation"]      # one monitor per value of this column

    [monitors.NAME.source]
    kind = "parquet" | "sql"
    path = "readings/"                   # parquet: file, folder or Hive dataset (relative to
                                         # the spec file)
    url = "..." | url_env = "VAR"        # sql: SQLAlchemy URL, or the variable that holds it
    table = "daily_readings" | query = "SELECT ..."   # sql
    time_column = "reading_date"
    [key_column = "row_id"]              # names rows in reports (default: time_column)
    [batch_rows = 65536]
    [time_partition = "month", time_partition_format = "%Y-%m"]   # parquet: a Hive partition
                                         # key holding dates, so windows prune whole folders
    [monitors.NAME.source.schema]        # declared column types, checked on every read
    heat_mwh = "float64"

    [monitors.NAME.windows]
    fresh = "90d"                        # trailing duration (d, h, w) before the run's date;
                                         # the window is half-open [as_of - fresh, as_of)
    [baseline_start = "2024-01-01", baseline_end = "2024-12-31"]   # fixed baseline, half-open
                                         # omitted: the first run's fresh window becomes the
                                         # baseline, and a promotion resets it

    [monitors.NAME.family]               # the same keys as a family file
    response = "y"
    chosen = "b"
    criterion = "aic" | "bic" | "aicc"
    [alpha = 0.05]
    [margin = 2.0]
    [monitors.NAME.family.candidates]
    a = "y ~ x"
    b = "y ~ x + z"

    [monitors.NAME.schedule]
    cron = "30 2 * * *"                  # minute hour day-of-month month day-of-week
    [timezone = "UTC"]
    [when_missed = "run_latest" | "run_all" | "skip"]
    [late_start_grace_minutes = 120]

    [monitors.NAME.alerts]               # when an alert opens and clears (all optional)
    [open_after_runs = 4, out_of_last_runs = 6]   # fixed-window findings: k breached
                                         # runs among the last n evaluated runs open an alert
    [clear_after_clean_runs = 5]         # fixed-window findings: clean runs in a row to clear
    [watch_clear_after_clean_runs = 5]   # sequential watch: clean runs in a row to clear
    [sequential_watch = true]            # run the nightly CUSUM charts on the new rows
    [watch_coefficients = true]          # one chart per slope of the chosen model
    [nights_between_false_alarms = 800]  # target run length of the charts of one model
    [rows_per_night = 1.0]               # new rows a run brings; omitted: estimated from
                                         # the baseline window and the schedule
    [false_discovery_rate = 0.001]       # Benjamini-Hochberg level across a run's p-values
    [highest_window_severity = "warning"]  # cap for alerts from fixed-window tests
    [max_r_squared_drop = 0.2]           # R² of the chosen model below the baseline's
    [min_rows = 30]                      # data problems: fewer usable rows in a segment,
    [max_dropped_share = 0.1]            # a larger share of rows left out,
    [max_unseen_level_rows = 0]          # more rows with category values never seen,
    [max_days_without_new_rows = 0]      # the newest row older than this while no new
                                         # row arrived since the last run

    [monitors.NAME.checks]               # the assumption checks (all optional)
    [quiet = ["white", "vif"]]           # check ids that never raise alerts (still stored)
    [sample_size = 5000, seed = 20240917, lags = 10]   # sampled checks; serial-correlation
                                         # lag order (default min(10, n // 5))
    [fail_level = 0.01, warn_level = 0.05]   # p-value levels of each check's own verdict
    [white_max_columns = 120]

    [[monitors.NAME.notify]]             # one table per target (none: alerts stay in the store)
    kind = "log" | "jsonl" | "webhook" | "email" | "callable"
    [name = "..."]                       # default: the kind; unique within the monitor
    [min_severity = "info" | "warning" | "critical"]   # default warning for e-mail, else info
    path = "alerts.jsonl"                # jsonl (relative to the spec file)
    url_env = "VAR" | url = "https://..."   # webhook; [secret_env = "VAR"] signs the body
    [timeout_seconds = 10]               # webhook and e-mail
    host = "smtp.example.org", sender = "...", recipients = ["..."]   # email
    [port = 587, security = "starttls" | "ssl" | "plain"]
    [username_env = "VAR", password_env = "VAR"]
    function = "package.module:name"     # callable (or pass ``functions=`` to run_monitor)

    [monitors.NAME.delivery]             # retries (all optional)
    [tries_per_pass = 3, pause_seconds = 1.0]   # tries within one delivery pass
    [first_backoff_minutes = 5, longest_backoff_minutes = 360]   # next automatic try

Validation happens before anything runs; every error names the key path, the
value and the fix (exit code 2).  Secrets (webhook URLs and keys, SMTP
credentials) are never written in the file: the keys ending in ``_env`` name
environment variables read when a message is sent.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from storage.sources import DECLARED_TYPES

from ..errors import ConfigurationError

__all__ = [
    "AlertSettings",
    "ChecksSettings",
    "DeliverySettings",
    "FamilySettings",
    "MonitorSpec",
    "NotifySpec",
    "ScheduleSpec",
    "SourceSpec",
    "Spec",
    "WindowSpec",
    "load_spec",
    "parse_duration",
    "parse_spec",
]

_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,62}$")
_CRITERIA = ("aic", "bic", "aicc")
_MISSED = ("run_latest", "run_all", "skip")
_TYPES = tuple(sorted(DECLARED_TYPES))


@dataclass(frozen=True, slots=True)
class SourceSpec:
    kind: str
    time_column: str
    path: Path | None = None
    url: str | None = None
    url_env: str | None = None
    table: str | None = None
    query: str | None = None
    key_column: str | None = None
    batch_rows: int = 65_536
    schema: Mapping[str, str] = field(default_factory=dict)
    time_partition: str | None = None
    time_partition_format: str = "%Y-%m-%d"


@dataclass(frozen=True, slots=True)
class WindowSpec:
    fresh: dt.timedelta
    baseline_start: dt.datetime | None = None
    baseline_end: dt.datetime | None = None

    def fresh_window(self, as_of: dt.datetime) -> tuple[dt.datetime, dt.datetime]:
        """Half-open ``[as_of - fresh, as_of)``."""
        return as_of - self.fresh, as_of


@dataclass(frozen=True, slots=True)
class FamilySettings:
    response: str
    candidates: Mapping[str, str]
    chosen: str
    criterion: str = "aic"
    alpha: float = 0.05
    margin: float = 2.0


@dataclass(frozen=True, slots=True)
class ScheduleSpec:
    cron: str
    timezone: str = "UTC"
    when_missed: str = "run_latest"
    late_start_grace_minutes: int = 120


@dataclass(frozen=True, slots=True)
class AlertSettings:
    """``[monitors.NAME.alerts]``: mapped onto :class:`monitor.runs.policy.AlertPolicy`.

    Defaults are the policy's own (measured, see that module); the data limits
    are regwarden defaults (common practice, no published source).
    """

    open_after_runs: int = 4
    out_of_last_runs: int = 6
    clear_after_clean_runs: int = 5
    watch_clear_after_clean_runs: int = 5
    sequential_watch: bool = True
    watch_coefficients: bool = True
    nights_between_false_alarms: float = 800.0
    rows_per_night: float | None = None
    false_discovery_rate: float = 0.001
    highest_window_severity: str = "warning"
    max_r_squared_drop: float = 0.2
    min_rows: int = 30
    max_dropped_share: float = 0.1
    max_unseen_level_rows: int = 0
    max_days_without_new_rows: float = 0.0


@dataclass(frozen=True, slots=True)
class ChecksSettings:
    """``[monitors.NAME.checks]``: mapped onto ``CheckOptions``; ``quiet`` ones raise no alerts."""

    quiet: tuple[str, ...] = ()
    sample_size: int = 5000
    seed: int = 20240917
    lags: int | None = None
    fail_level: float = 0.01
    warn_level: float = 0.05
    white_max_columns: int = 120


@dataclass(frozen=True, slots=True)
class NotifySpec:
    """One ``[[monitors.NAME.notify]]`` target (fields of the other kinds stay empty)."""

    kind: str
    name: str
    min_severity: str
    path: Path | None = None
    url: str | None = None
    url_env: str | None = None
    secret_env: str | None = None
    timeout_seconds: float = 10.0
    host: str | None = None
    port: int = 587
    security: str = "starttls"
    sender: str | None = None
    recipients: tuple[str, ...] = ()
    username_env: str | None = None
    password_env: str | None = None
    function: str | None = None


@dataclass(frozen=True, slots=True)
class DeliverySettings:
    """``[monitors.NAME.delivery]``: tries within a pass, and the backoff between passes."""

    tries_per_pass: int = 3
    pause_seconds: float = 1.0
    first_backoff_minutes: float = 5.0
    longest_backoff_minutes: float = 360.0


@dataclass(frozen=True, slots=True)
class MonitorSpec:
    name: str
    source: SourceSpec
    windows: WindowSpec
    family: FamilySettings
    description: str = ""
    segment_column: str | None = None
    schedule: ScheduleSpec | None = None
    alerts: AlertSettings = field(default_factory=AlertSettings)
    checks: ChecksSettings = field(default_factory=ChecksSettings)
    notify: tuple[NotifySpec, ...] = ()
    delivery: DeliverySettings = field(default_factory=DeliverySettings)


@dataclass(frozen=True, slots=True)
class Spec:
    path: Path | None
    store_url: str | None
    store_env: str | None
    table_prefix: str
    monitors: Mapping[str, MonitorSpec]
    digest: str

    def monitor(self, name: str) -> MonitorSpec:
        try:
            return self.monitors[name]
        except KeyError:
            known = ", ".join(sorted(self.monitors)) or "(none)"
            raise ConfigurationError(f"no monitor named {name!r}", where="--monitor",
                                     hint=f"the spec defines: {known}") from None


# ---------------------------------------------------------------------------- helpers


class _Reader:
    """Reads one table of the spec and remembers which keys were used."""

    def __init__(self, table: Any, path: str) -> None:
        if not isinstance(table, Mapping):
            raise ConfigurationError(f"{path} must be a table, got {_show(table)}",
                                     where=path, hint=f"write it as [{path}]")
        self.table = table
        self.path = path
        self.used: set[str] = set()

    def key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def get(self, name: str, kind: type | tuple[type, ...], default: Any = ..., *,
            hint: str = "") -> Any:
        self.used.add(name)
        if name not in self.table:
            if default is ...:
                raise ConfigurationError(f"{self.key(name)} is missing", where=self.key(name),
                                         hint=hint or f"add {name} = ... under [{self.path}]")
            return default
        value = self.table[name]
        kinds = kind if isinstance(kind, tuple) else (kind,)
        if bool in kinds or not isinstance(value, bool):
            if isinstance(value, kinds):
                return value
            if float in kinds and isinstance(value, int) and not isinstance(value, bool):
                return float(value)
        names = " or ".join(k.__name__.replace("str", "text").replace("float", "number")
                            .replace("int", "whole number").replace("dict", "table")
                            for k in kinds)
        raise ConfigurationError(f"{self.key(name)} must be {names}, got {_show(value)}",
                                 where=self.key(name), hint=hint or f"fix {self.key(name)}")

    def table_of(self, name: str, default: Any = ...) -> _Reader | None:
        value = self.get(name, dict, default)
        return None if value is None else _Reader(value, self.key(name))

    def finish(self) -> None:
        unknown = sorted(set(self.table) - self.used)
        if unknown:
            known = ", ".join(sorted(self.used))
            raise ConfigurationError(
                f"unknown key {self.key(unknown[0])}", where=self.key(unknown[0]),
                hint=f"check the spelling; keys allowed here: {known}")


def _show(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def parse_duration(text: str, where: str) -> dt.timedelta:
    """``90d``, ``12w``, ``36h`` (one number and one unit)."""
    match = re.fullmatch(r"\s*(\d+)\s*([dhw])\s*", str(text))
    if not match or int(match.group(1)) == 0:
        raise ConfigurationError(f"{where} must be a positive duration like '90d', got "
                                 f"{_show(text)}", where=where,
                                 hint="use a whole number followed by d (days), w (weeks) or "
                                 "h (hours)")
    amount, unit = int(match.group(1)), match.group(2)
    return {"d": dt.timedelta(days=amount), "w": dt.timedelta(weeks=amount),
            "h": dt.timedelta(hours=amount)}[unit]


def _instant(value: Any, where: str) -> dt.datetime:
    if isinstance(value, dt.datetime):
        moment = value
    elif isinstance(value, dt.date):
        moment = dt.datetime(value.year, value.month, value.day)
    elif isinstance(value, str):
        try:
            moment = dt.datetime.fromisoformat(value)
        except ValueError:
            raise ConfigurationError(f"{where} must be a date like 2024-01-31, got "
                                     f"{_show(value)}", where=where,
                                     hint="write an ISO date or date-time") from None
    else:
        raise ConfigurationError(f"{where} must be a date, got {_show(value)}", where=where,
                                 hint="write an ISO date like 2024-01-31")
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=dt.UTC)
    return moment.astimezone(dt.UTC)


_CRON_FIELDS = (("minute", 0, 59), ("hour", 0, 23), ("day of month", 1, 31), ("month", 1, 12),
                ("day of week", 0, 7))


def _check_cron(text: str, where: str) -> None:
    fields = str(text).split()
    if len(fields) != 5:
        raise ConfigurationError(
            f"{where} must have 5 fields (minute hour day-of-month month day-of-week), got "
            f"{_show(text)}", where=where, hint="for example '30 2 * * *' runs at 02:30 daily")
    for value, (label, low, high) in zip(fields, _CRON_FIELDS, strict=True):
        for part in value.split(","):
            body, _, step = part.partition("/")
            if step and (not step.isdigit() or int(step) == 0):
                raise ConfigurationError(f"{where}: bad step {part!r} in the {label} field",
                                         where=where, hint="a step is a positive whole number")
            if body == "*":
                continue
            bounds = body.split("-")
            if len(bounds) > 2 or not all(b.isdigit() for b in bounds) or not all(
                    low <= int(b) <= high for b in bounds):
                raise ConfigurationError(
                    f"{where}: {part!r} is not valid in the {label} field ({low}-{high})",
                    where=where, hint="use numbers, ranges a-b, lists a,b, steps */n or *")


# ---------------------------------------------------------------------------- sections


def parse_family(table: Mapping[str, Any], where: str) -> FamilySettings:
    """The family keys (also the whole content of a family file), validated by the family's
    own parser (:func:`monitor.family.parse_family_mapping`) with the key path ``where``."""
    from ..family import parse_family_mapping

    family = parse_family_mapping(table, where=where)
    return FamilySettings(family.response, dict(family.candidates), family.chosen,
                          family.criterion, float(family.alpha), float(family.margin))


def _parse_source(reader: _Reader, base: Path | None) -> SourceSpec:
    kind = reader.get("kind", str, hint="kind = 'parquet' or kind = 'sql'")
    if kind not in ("parquet", "sql"):
        raise ConfigurationError(f"{reader.key('kind')} must be 'parquet' or 'sql', got "
                                 f"{_show(kind)}", where=reader.key("kind"),
                                 hint="pick the kind of store the rows live in")
    time_column = reader.get("time_column", str)
    key_column = reader.get("key_column", str, None)
    batch_rows = reader.get("batch_rows", int, 65_536)
    if batch_rows < 100:
        raise ConfigurationError(f"{reader.key('batch_rows')} must be at least 100, got "
                                 f"{batch_rows}", where=reader.key("batch_rows"),
                                 hint="the default, 65536, suits most machines")
    schema_reader = reader.table_of("schema", None)
    schema: dict[str, str] = {}
    if schema_reader is not None:
        for column in schema_reader.table:
            type_name = schema_reader.get(column, str)
            if type_name not in _TYPES:
                raise ConfigurationError(
                    f"{schema_reader.key(column)} has unknown type {_show(type_name)}",
                    where=schema_reader.key(column), hint=f"use one of {', '.join(_TYPES)}")
            schema[column] = type_name
    if kind == "parquet":
        time_partition = reader.get("time_partition", str, None)
        time_partition_format = reader.get("time_partition_format", str, "%Y-%m-%d")
        raw = reader.get("path", str)
        path = Path(raw)
        if not path.is_absolute() and base is not None:
            path = base / path
        reader.finish()
        return SourceSpec(kind, time_column, path=path, key_column=key_column,
                          batch_rows=batch_rows, schema=schema, time_partition=time_partition,
                          time_partition_format=time_partition_format)
    url = reader.get("url", str, None)
    url_env = reader.get("url_env", str, None)
    if (url is None) == (url_env is None):
        raise ConfigurationError(f"{reader.path} needs exactly one of url or url_env",
                                 where=reader.path,
                                 hint="prefer url_env = 'VARIABLE' so no password sits in the file")
    table = reader.get("table", str, None)
    query = reader.get("query", str, None)
    if (table is None) == (query is None):
        raise ConfigurationError(f"{reader.path} needs exactly one of table or query",
                                 where=reader.path, hint="name a table, or give a SELECT")
    if url and url.startswith("sqlite:///") and not url.startswith("sqlite:////") and base:
        url = "sqlite:///" + str(base / url[len("sqlite:///"):])
    reader.finish()
    return SourceSpec(kind, time_column, url=url, url_env=url_env, table=table, query=query,
                      key_column=key_column, batch_rows=batch_rows, schema=schema)


def _parse_windows(reader: _Reader) -> WindowSpec:
    fresh = parse_duration(reader.get("fresh", str, hint="fresh = '90d'"), reader.key("fresh"))
    start = reader.get("baseline_start", (str, dt.date, dt.datetime), None)
    end = reader.get("baseline_end", (str, dt.date, dt.datetime), None)
    if (start is None) != (end is None):
        raise ConfigurationError(f"{reader.path} needs both baseline_start and baseline_end, "
                                 "or neither", where=reader.path,
                                 hint="omit both to take the first run's window as baseline")
    reader.finish()
    if start is None:
        return WindowSpec(fresh)
    begin = _instant(start, reader.key("baseline_start"))
    finish = _instant(end, reader.key("baseline_end"))
    if finish <= begin:
        raise ConfigurationError(f"{reader.key('baseline_end')} must come after baseline_start",
                                 where=reader.key("baseline_end"), hint="swap the dates")
    return WindowSpec(fresh, begin, finish)


def _parse_schedule(reader: _Reader) -> ScheduleSpec:
    cron = reader.get("cron", str)
    _check_cron(cron, reader.key("cron"))
    timezone = reader.get("timezone", str, "UTC")
    try:
        ZoneInfo(timezone)
    except (ZoneInfoNotFoundError, ValueError):
        raise ConfigurationError(f"{reader.key('timezone')} = {_show(timezone)} is not a known "
                                 "time zone", where=reader.key("timezone"),
                                 hint="use an IANA name such as 'Europe/Berlin' or 'UTC'") from None
    when_missed = reader.get("when_missed", str, "run_latest")
    if when_missed not in _MISSED:
        raise ConfigurationError(f"{reader.key('when_missed')} must be one of "
                                 f"{', '.join(_MISSED)}, got {_show(when_missed)}",
                                 where=reader.key("when_missed"), hint="run_latest is usual")
    grace = reader.get("late_start_grace_minutes", int, 120)
    if grace < 0:
        raise ConfigurationError(f"{reader.key('late_start_grace_minutes')} must not be "
                                 "negative", where=reader.key("late_start_grace_minutes"),
                                 hint="how late (minutes) a run may still start")
    reader.finish()
    return ScheduleSpec(cron, timezone, when_missed, grace)


_ENV_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_SEVERITIES = ("info", "warning", "critical")
_NOTIFY_KINDS = ("log", "jsonl", "webhook", "email", "callable")
_SECURITY = ("starttls", "ssl", "plain")


def _bounded(reader: _Reader, name: str, kind: type, default: Any, *, low: float | None = None,
             high: float | None = None, low_open: bool = False, hint: str) -> Any:
    """A number under ``name`` within [low, high] (``low_open``: strictly above low)."""
    value = reader.get(name, kind, default)
    if value is None:
        return None
    too_low = low is not None and (value <= low if low_open else value < low)
    if too_low or (high is not None and value > high):
        if low is not None and high is not None:
            span = f"between {low:g} and {high:g}"
        elif low is not None:
            span = f"{'above' if low_open else 'at least'} {low:g}"
        else:
            span = f"at most {high:g}"
        raise ConfigurationError(f"{reader.key(name)} must be {span}, got {value!r}",
                                 where=reader.key(name), hint=hint)
    return value


def _choice(reader: _Reader, name: str, choices: tuple[str, ...], default: Any) -> Any:
    value = reader.get(name, str, default)
    if value is not None and value not in choices:
        raise ConfigurationError(f"{reader.key(name)} must be one of {', '.join(choices)}, got "
                                 f"{_show(value)}", where=reader.key(name),
                                 hint=f"pick one of {', '.join(choices)}")
    return value


def _env_name(reader: _Reader, name: str) -> str | None:
    value = reader.get(name, str, None)
    if value is not None and not _ENV_NAME.match(value):
        raise ConfigurationError(f"{reader.key(name)} must name an environment variable, got "
                                 f"{_show(value)}", where=reader.key(name),
                                 hint="letters, digits and '_', e.g. REGWARDEN_HOOK_SECRET; the "
                                 "value itself stays out of the file")
    return value


def _parse_alerts(reader: _Reader | None) -> AlertSettings:
    if reader is None:
        return AlertSettings()
    d = AlertSettings()
    runs_hint = "e.g. open_after_runs = 4 and out_of_last_runs = 6"
    out_of = _bounded(reader, "out_of_last_runs", int, d.out_of_last_runs, low=1, high=100,
                      hint=runs_hint)
    open_after = _bounded(reader, "open_after_runs", int, d.open_after_runs, low=1,
                          high=out_of, hint=f"it cannot exceed out_of_last_runs ({out_of}); "
                          + runs_hint)
    settings = AlertSettings(
        open_after_runs=open_after, out_of_last_runs=out_of,
        clear_after_clean_runs=_bounded(reader, "clear_after_clean_runs", int,
                                        d.clear_after_clean_runs, low=1, high=100,
                                        hint="clean runs in a row before an alert clears"),
        watch_clear_after_clean_runs=_bounded(
            reader, "watch_clear_after_clean_runs", int, d.watch_clear_after_clean_runs, low=1,
            high=100, hint="clean runs in a row before a sequential alert clears"),
        sequential_watch=reader.get("sequential_watch", bool, d.sequential_watch),
        watch_coefficients=reader.get("watch_coefficients", bool, d.watch_coefficients),
        nights_between_false_alarms=_bounded(
            reader, "nights_between_false_alarms", float, d.nights_between_false_alarms,
            low=10, high=1e6, hint="the default, 800, is about one false alarm per two years"),
        rows_per_night=_bounded(reader, "rows_per_night", float, None, low=0, low_open=True,
                                high=1e7, hint="new rows one run brings; omit it to estimate"),
        false_discovery_rate=_bounded(reader, "false_discovery_rate", float,
                                      d.false_discovery_rate, low=0, low_open=True, high=0.5,
                                      hint="the default is 0.001"),
        highest_window_severity=_choice(reader, "highest_window_severity", _SEVERITIES,
                                        d.highest_window_severity),
        max_r_squared_drop=_bounded(reader, "max_r_squared_drop", float, d.max_r_squared_drop,
                                    low=0, low_open=True, high=1,
                                    hint="a drop of R² below the baseline's, e.g. 0.2"),
        min_rows=_bounded(reader, "min_rows", int, d.min_rows, low=1,
                          hint="usable rows a segment needs in its window"),
        max_dropped_share=_bounded(reader, "max_dropped_share", float, d.max_dropped_share,
                                   low=0, high=1, hint="a share between 0 and 1, e.g. 0.1"),
        max_unseen_level_rows=_bounded(reader, "max_unseen_level_rows", int,
                                       d.max_unseen_level_rows, low=0,
                                       hint="0 alerts on the first unseen category value"),
        max_days_without_new_rows=_bounded(
            reader, "max_days_without_new_rows", float, d.max_days_without_new_rows, low=0,
            hint="e.g. 3 for data that pause over weekends"),
    )
    reader.finish()
    return settings


def _parse_checks(reader: _Reader | None) -> ChecksSettings:
    if reader is None:
        return ChecksSettings()
    from ..stats.checks import CHECKS

    d = ChecksSettings()
    quiet = reader.get("quiet", list, [])
    for index, check in enumerate(quiet):
        if check not in CHECKS:
            where = f"{reader.key('quiet')}[{index}]"
            raise ConfigurationError(f"{where} = {_show(check)} is not a check id", where=where,
                                     hint="check ids: " + ", ".join(CHECKS))
    warn_level = _bounded(reader, "warn_level", float, d.warn_level, low=0, low_open=True,
                          high=0.5, hint="the usual level is 0.05")
    settings = ChecksSettings(
        quiet=tuple(quiet),
        sample_size=_bounded(reader, "sample_size", int, d.sample_size, low=50, high=10**7,
                             hint="5000 keeps Shapiro-Wilk's p-value accurate"),
        seed=_bounded(reader, "seed", int, d.seed, low=0, hint="any whole number"),
        lags=_bounded(reader, "lags", int, None, low=1, high=1000,
                      hint="omit it for min(10, n // 5)"),
        fail_level=_bounded(reader, "fail_level", float, d.fail_level, low=0, low_open=True,
                            high=warn_level, hint=f"at most warn_level ({warn_level})"),
        warn_level=warn_level,
        white_max_columns=_bounded(reader, "white_max_columns", int, d.white_max_columns,
                                   low=3, high=10_000, hint="the default is 120"),
    )
    reader.finish()
    return settings


def _parse_notify(items: list[Any], where: str, base: Path | None) -> tuple[NotifySpec, ...]:
    targets: list[NotifySpec] = []
    names: set[str] = set()
    for index, item in enumerate(items):
        reader = _Reader(item, f"{where}[{index}]")
        kind = _choice(reader, "kind", _NOTIFY_KINDS, ...)
        name = reader.get("name", str, kind)
        if not _NAME.match(name) or name in names:
            problem = "used twice" if name in names else "not allowed"
            raise ConfigurationError(
                f"{reader.key('name')} = {_show(name)} is {problem}", where=reader.key("name"),
                hint="give each target of the monitor its own name (letters, digits, '_', '-', "
                "'.')")
        names.add(name)
        severity = _choice(reader, "min_severity", _SEVERITIES,
                           "warning" if kind == "email" else "info")
        values: dict[str, Any] = {}
        if kind == "jsonl":
            path = Path(reader.get("path", str, hint="path = 'alerts.jsonl'"))
            values["path"] = base / path if base is not None and not path.is_absolute() else path
        elif kind == "webhook":
            url = reader.get("url", str, None)
            url_env = _env_name(reader, "url_env")
            if (url is None) == (url_env is None):
                raise ConfigurationError(f"{reader.path} needs exactly one of url or url_env",
                                         where=reader.path, hint="prefer url_env = 'VARIABLE': "
                                         "webhook addresses often carry a token")
            if url is not None and not url.startswith(("http://", "https://")):
                raise ConfigurationError(f"{reader.key('url')} must start with http:// or "
                                         f"https://, got {_show(url)}", where=reader.key("url"),
                                         hint="give the receiver's full address")
            values.update(url=url, url_env=url_env, secret_env=_env_name(reader, "secret_env"))
        elif kind == "email":
            values["host"] = reader.get("host", str, hint="host = 'smtp.example.org'")
            values["port"] = _bounded(reader, "port", int, 587, low=1, high=65535,
                                      hint="587 for starttls, 465 for ssl")
            values["security"] = _choice(reader, "security", _SECURITY, "starttls")
            sender = reader.get("sender", str, hint="sender = 'regwarden@example.org'")
            recipients = reader.get("recipients", list, hint="recipients = ['a@example.org']")
            for i, address in enumerate([sender, *recipients]):
                if not isinstance(address, str) or "@" not in address:
                    key = reader.key("sender") if i == 0 else f"{reader.key('recipients')}[{i - 1}]"
                    raise ConfigurationError(f"{key} must be an e-mail address, got "
                                             f"{_show(address)}", where=key,
                                             hint="write it as name@domain")
            if not recipients:
                raise ConfigurationError(f"{reader.key('recipients')} is empty",
                                         where=reader.key("recipients"),
                                         hint="list at least one address")
            values.update(sender=sender, recipients=tuple(recipients),
                          username_env=_env_name(reader, "username_env"),
                          password_env=_env_name(reader, "password_env"))
        elif kind == "callable":
            function = reader.get("function", str, hint="function = 'package.module:name'")
            module, _, attribute = function.partition(":")
            if not module or not attribute or not all(
                    part.isidentifier() for part in [*module.split("."), attribute]):
                raise ConfigurationError(f"{reader.key('function')} must look like "
                                         f"'package.module:name', got {_show(function)}",
                                         where=reader.key("function"),
                                         hint="name an importable module and a function in it")
            values["function"] = function
        if kind in ("webhook", "email"):
            values["timeout_seconds"] = _bounded(
                reader, "timeout_seconds", float, 10.0 if kind == "webhook" else 30.0, low=0,
                low_open=True, high=600, hint="seconds to wait for the receiver")
        reader.finish()
        targets.append(NotifySpec(kind=kind, name=name, min_severity=severity, **values))
    return tuple(targets)


def _parse_delivery(reader: _Reader | None) -> DeliverySettings:
    if reader is None:
        return DeliverySettings()
    d = DeliverySettings()
    first = _bounded(reader, "first_backoff_minutes", float, d.first_backoff_minutes, low=0,
                     low_open=True, hint="minutes before the first automatic retry")
    settings = DeliverySettings(
        tries_per_pass=_bounded(reader, "tries_per_pass", int, d.tries_per_pass, low=1, high=10,
                                hint="tries of one message within one delivery pass"),
        pause_seconds=_bounded(reader, "pause_seconds", float, d.pause_seconds, low=0, high=60,
                               hint="pause before the second try (doubled before each next)"),
        first_backoff_minutes=first,
        longest_backoff_minutes=_bounded(reader, "longest_backoff_minutes", float,
                                         d.longest_backoff_minutes, low=first,
                                         hint=f"at least first_backoff_minutes ({first:g})"),
    )
    reader.finish()
    return settings


def parse_spec(data: Mapping[str, Any], *, path: Path | None = None) -> Spec:
    """Validate a parsed TOML document into a :class:`Spec`."""
    root = _Reader(data, "")
    base = path.parent if path is not None else None
    history = root.table_of("history", None)
    store_url = store_env = None
    table_prefix = "regwarden_"
    if history is not None:
        store_url = history.get("store", str, None)
        store_env = history.get("store_env", str, None)
        table_prefix = history.get("table_prefix", str, table_prefix)
        if store_url and store_env:
            raise ConfigurationError("history has both store and store_env", where="history",
                                     hint="keep one: store_env keeps passwords out of the file")
        history.finish()
    if store_url and store_url.startswith("sqlite:///") and not store_url.startswith(
            "sqlite:////") and base is not None:
        store_url = "sqlite:///" + str(base / store_url[len("sqlite:///"):])
    if store_url is None and store_env is None:
        store_url = f"sqlite:///{(base or Path.cwd()) / 'history.sqlite'}"
    monitors_reader = root.table_of("monitors", None)
    if monitors_reader is None or not monitors_reader.table:
        raise ConfigurationError("the spec defines no monitor", where="monitors",
                                 hint="add a [monitors.NAME] table with source, windows and "
                                 "family")
    monitors: dict[str, MonitorSpec] = {}
    for name in monitors_reader.table:
        monitors_reader.used.add(name)
        key = monitors_reader.key(name)
        if not _NAME.match(name):
            raise ConfigurationError(f"monitor name {name!r} is not allowed", where=key,
                                     hint="use letters, digits, '_', '-' or '.' (up to 63)")
        reader = _Reader(monitors_reader.table[name], key)
        description = reader.get("description", str, "")
        segment_column = reader.get("segment_column", str, None)
        source_reader = reader.table_of("source")
        windows_reader = reader.table_of("windows")
        family_table = reader.get("family", dict)
        schedule_reader = reader.table_of("schedule", None)
        assert source_reader is not None and windows_reader is not None
        source = _parse_source(source_reader, base)
        windows = _parse_windows(windows_reader)
        family = parse_family(family_table, reader.key("family"))
        schedule = _parse_schedule(schedule_reader) if schedule_reader is not None else None
        alerts = _parse_alerts(reader.table_of("alerts", None))
        checks = _parse_checks(reader.table_of("checks", None))
        notify = _parse_notify(reader.get("notify", list, [],
                                          hint="write each target as [[monitors.NAME.notify]]"),
                               reader.key("notify"), base)
        delivery = _parse_delivery(reader.table_of("delivery", None))
        reader.finish()
        monitors[name] = MonitorSpec(name, source, windows, family, description,
                                     segment_column, schedule, alerts, checks, notify, delivery)
    root.used.add("monitors")
    root.finish()
    digest = hashlib.sha256(json.dumps(data, sort_keys=True, default=str).encode()).hexdigest()
    return Spec(path, store_url, store_env, table_prefix, monitors, digest)


def load_spec(path: str | Path) -> Spec:
    """Read and validate a spec file; every problem is a :class:`ConfigurationError`."""
    file = Path(path)
    if not file.is_file():
        raise ConfigurationError(f"no spec file at {str(file)!r}", where=str(file),
                                 hint="pass the path of the monitor spec (TOML)")
    try:
        data = tomllib.loads(file.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as error:
        raise ConfigurationError(f"{file} is not valid TOML: {error}", where=str(file),
                                 hint="fix the syntax at the line named") from error
    return parse_spec(data, path=file.resolve())
