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

Validation happens before anything runs; every error names the key path, the
value and the fix (exit code 2).
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

from ..errors import ConfigurationError, FormulaError
from storage.sources import DECLARED_TYPES

from ..stats.formula import parse_formula

__all__ = [
    "FamilySettings",
    "MonitorSpec",
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
class MonitorSpec:
    name: str
    source: SourceSpec
    windows: WindowSpec
    family: FamilySettings
    description: str = ""
    segment_column: str | None = None
    schedule: ScheduleSpec | None = None


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
    """The family keys (also the whole content of a family file)."""
    reader = _Reader(table, where)
    response = reader.get("response", str, hint="name the response column, e.g. response = 'y'")
    chosen = reader.get("chosen", str, hint="name the candidate in production")
    criterion = reader.get("criterion", str, "aic").lower()
    if criterion not in _CRITERIA:
        raise ConfigurationError(f"{reader.key('criterion')} must be one of "
                                 f"{', '.join(_CRITERIA)}, got {_show(criterion)}",
                                 where=reader.key("criterion"), hint="pick aic, bic or aicc")
    alpha = reader.get("alpha", float, 0.05)
    if not 0.0 < alpha < 1.0:
        raise ConfigurationError(f"{reader.key('alpha')} must lie between 0 and 1, got {alpha}",
                                 where=reader.key("alpha"), hint="the usual level is 0.05")
    margin = reader.get("margin", float, 2.0)
    if margin < 0:
        raise ConfigurationError(f"{reader.key('margin')} must not be negative, got {margin}",
                                 where=reader.key("margin"), hint="the usual margin is 2")
    candidates_reader = reader.table_of("candidates")
    assert candidates_reader is not None
    candidates: dict[str, str] = {}
    for name in candidates_reader.table:
        formula = candidates_reader.get(name, str, hint="write name = \"y ~ x + z\"")
        key = candidates_reader.key(name)
        if not _NAME.match(name):
            raise ConfigurationError(f"candidate name {name!r} is not allowed", where=key,
                                     hint="use letters, digits, '_', '-' or '.'")
        try:
            parsed = parse_formula(formula)
        except FormulaError as error:
            raise ConfigurationError(f"{key}: {error.what}", where=key,
                                     hint=error.hint or "fix the formula") from error
        if parsed.response.label != response:
            raise ConfigurationError(
                f"{key} models {parsed.response.label!r} but the family's response is "
                f"{response!r}", where=key, hint="every candidate must have the same response")
        candidates[name] = formula
    if len(candidates) < 2:
        raise ConfigurationError(f"{candidates_reader.path} needs at least 2 candidates, got "
                                 f"{len(candidates)}", where=candidates_reader.path,
                                 hint="a family compares models: add another candidate")
    if chosen not in candidates:
        raise ConfigurationError(f"{reader.key('chosen')} = {chosen!r} is not a candidate",
                                 where=reader.key("chosen"),
                                 hint=f"the candidates are: {', '.join(candidates)}")
    reader.finish()
    return FamilySettings(response, candidates, chosen, criterion, float(alpha), float(margin))


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
        reader.finish()
        monitors[name] = MonitorSpec(name, source, windows, family, description,
                                     segment_column, schedule)
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
