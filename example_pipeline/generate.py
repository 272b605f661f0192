"""Generate the INVENTED district-heating readings of the demo, and append days to them.

The data written here are made up (see :mod:`example_pipeline.scenario`); they
exist to show regwarden at work and describe no real operator.

Two stores are written side by side under one folder, holding the same rows:

``readings/``
    a Hive-partitioned Parquet dataset, one folder per substation and month::

        readings/substation=harbour-row/month=2024-03/part-0.parquet

    The partition keys are not repeated inside the files.  A month folder
    holds every row of that substation and month, so a reader filtering on a
    time window can skip whole months.  ``generate`` writes ``part-0.parquet``;
    each later append writes ``part-<yyyymmdd>.parquet`` (named after its first
    day) into the month it belongs to.  Files are written under a hidden name
    and renamed, so a reader never sees half a file.
``readings.sqlite``
    a SQLite database with the table ``daily_readings`` (``reading_date`` is
    stored as ISO text without zone, in UTC; unique on substation and day).

A small manifest, ``generated.json``, remembers the seed, the span and the last
day written, so :func:`append_days` can continue where the stores end.  The
rows an append adds are exactly the rows a full generation would hold for
those days.

Command line::

    python -m example_pipeline.generate OUT_DIR [--as-of 2023-01-31] [--seed 7309]
    python -m example_pipeline.generate OUT_DIR --append-through 2023-02-28
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import functools
import json
import os
import shutil
import sys
from collections.abc import Iterable, Sequence
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import sqlalchemy as sa

from example_pipeline.scenario import (
    DAYS,
    DEFAULT_SEED,
    EVENTS,
    HOLIDAYS,
    REFERENCE_TEMP_C,
    START,
    SUBSTATION_NAMES,
    SUBSTATIONS,
    PlantedEvent,
    event_weight,
    substation,
)

__all__ = [
    "MANIFEST_NAME",
    "PARQUET_DIR_NAME",
    "SQLITE_NAME",
    "TABLE_NAME",
    "Appended",
    "GeneratedData",
    "append_day",
    "append_days",
    "generate",
    "main",
    "read_manifest",
    "simulate",
]

PARQUET_DIR_NAME = "readings"
SQLITE_NAME = "readings.sqlite"
TABLE_NAME = "daily_readings"
MANIFEST_NAME = "generated.json"
_MANIFEST_FORMAT = 1

#: Columns written to the stores, in order (``substation`` is a partition key in Parquet).
STORED_COLUMNS = ("row_id", "reading_date", "substation", "heat_mwh", "outdoor_temp_c",
                  "wind_m_s", "sunshine_h", "weekend_or_holiday")
_FILE_SCHEMA = pa.schema([
    ("row_id", pa.int64()),
    ("reading_date", pa.timestamp("us", tz="UTC")),
    ("heat_mwh", pa.float64()),
    ("outdoor_temp_c", pa.float64()),
    ("wind_m_s", pa.float64()),
    ("sunshine_h", pa.float64()),
    ("weekend_or_holiday", pa.int64()),
])
#: Largest wind reading a failing sensor produces, m/s.
_MAX_WIND_READING = 45.0


@dataclasses.dataclass(frozen=True, slots=True)
class GeneratedData:
    """What :func:`generate` wrote.

    ``first_day``..``last_day`` is the scenario's whole span (inclusive);
    ``written_through`` is the last day now in the stores.
    """

    out_dir: Path
    parquet_dir: Path | None
    sqlite_path: Path | None
    table: str
    seed: int
    substations: tuple[str, ...]
    first_day: dt.date
    last_day: dt.date
    written_through: dt.date
    rows_written: int
    events: tuple[PlantedEvent, ...]

    @property
    def sqlite_url(self) -> str | None:
        """SQLAlchemy URL of the SQLite store (``None`` when it was not written)."""
        return None if self.sqlite_path is None else f"sqlite:///{self.sqlite_path}"


@dataclasses.dataclass(frozen=True, slots=True)
class Appended:
    """What one call of :func:`append_days` added (days inclusive)."""

    first_day: dt.date
    last_day: dt.date
    rows: int
    parquet_files: tuple[Path, ...]


# ----------------------------------------------------------------------------------- simulation


def _as_day(value: dt.date | dt.datetime | str, name: str) -> dt.date:
    if isinstance(value, str):
        try:
            return dt.date.fromisoformat(value)
        except ValueError as error:
            raise ValueError(f"{name} {value!r} is not a date; write it as YYYY-MM-DD") from error
    if isinstance(value, dt.datetime):
        if value.tzinfo is not None:
            value = value.astimezone(dt.UTC)
        return value.date()
    if isinstance(value, dt.date):
        return value
    raise TypeError(f"{name} must be a date, got {type(value).__name__} {value!r}")


def _check_substations(substations: Iterable[str]) -> tuple[str, ...]:
    if isinstance(substations, str):
        substations = (substations,)
    names = tuple(substations)
    if not names:
        raise ValueError("substations is empty; name at least one of "
                         + ", ".join(SUBSTATION_NAMES))
    for name in names:
        if name not in SUBSTATION_NAMES:
            raise ValueError(f"unknown substation {name!r}; the invented scenario has "
                             + ", ".join(SUBSTATION_NAMES))
    if len(set(names)) != len(names):
        raise ValueError(f"substations {names!r} names a substation twice")
    return names


def _seasonal_angle(dates: pd.DatetimeIndex, peak_day_of_year: float) -> np.ndarray:
    day_of_year = dates.day_of_year.to_numpy(dtype=np.float64)
    return 2.0 * np.pi * (day_of_year - peak_day_of_year) / 365.25


def _city_weather(seed: int, dates: pd.DatetimeIndex) -> dict[str, np.ndarray]:
    """Weather of the invented city: temperature and wind before local effects, sunshine."""
    rng = np.random.default_rng(np.random.SeedSequence([seed, 0]))
    n = len(dates)
    coldest = _seasonal_angle(dates, 20.0)  # coldest and windiest around 20 January
    # Daily anomalies persist for a few days: AR(1), phi 0.75, stationary SD 2.5 °C.
    phi, anomaly_sd = 0.75, 2.5
    shocks = rng.standard_normal(n) * anomaly_sd * np.sqrt(1.0 - phi**2)
    anomaly = np.empty(n)
    previous = rng.standard_normal() * anomaly_sd
    for index in range(n):
        previous = phi * previous + shocks[index]
        anomaly[index] = previous
    temperature = 9.0 - 8.0 * np.cos(coldest) + anomaly
    wind = (4.8 + 1.0 * np.cos(coldest)) * rng.weibull(2.0, n)
    longest = _seasonal_angle(dates, 172.0)  # longest day around 21 June
    day_length = 12.0 + 4.5 * np.cos(longest)
    clear_share = rng.beta(1.1, 1.6, n) * (0.8 + 0.2 * np.cos(longest))
    sunshine = np.round(day_length * clear_share, 1)
    return {"temperature": temperature, "wind": wind, "sunshine": sunshine}


def _day_off(dates: pd.DatetimeIndex) -> np.ndarray:
    weekend = dates.day_of_week.to_numpy() >= 5
    month_day = list(zip(dates.month, dates.day, strict=True))
    holiday = np.array([pair in HOLIDAYS for pair in month_day], dtype=bool)
    return (weekend | holiday).astype(np.int64)


@functools.lru_cache(maxsize=4)
def _simulate_cached(seed: int, start: dt.date, days: int,
                     substations: tuple[str, ...]) -> pd.DataFrame:
    dates = pd.date_range(pd.Timestamp(start, tz="UTC"), periods=days, freq="D")
    day_list = [stamp.date() for stamp in dates]
    city = _city_weather(seed, dates)
    day_off = _day_off(dates)
    frames = []
    for name in substations:
        site = substation(name)
        position = SUBSTATION_NAMES.index(name)
        # One stream per substation, drawn in a fixed order whether or not an event uses it,
        # so a substation's rows do not depend on which others are generated.
        rng = np.random.default_rng(np.random.SeedSequence([seed, 1 + position]))
        temperature = np.round(city["temperature"] + site.temp_offset_c
                               + rng.normal(0.0, 0.4, days), 1)
        true_wind = np.round(np.maximum(city["wind"] * site.wind_exposure
                                        + rng.normal(0.0, 0.3, days), 0.0), 1)
        noise = rng.standard_normal(days)
        outlier_rank_draw = rng.random(days)
        outlier_size_draw = rng.random(days)

        temp_slope = np.full(days, site.temp_slope)
        level = np.zeros(days)
        noise_sd = np.full(days, site.noise_sd)
        recorded_wind = true_wind.copy()
        gap = REFERENCE_TEMP_C - temperature
        for event in EVENTS:
            if event.substation != name:
                continue
            weight = np.array([event_weight(event, day) for day in day_list])
            if event.kind == "slope_change":
                temp_slope = temp_slope - event.size * weight
            elif event.kind == "level_shift":
                level = level + event.size * weight
            elif event.kind == "variance_regime":
                noise_sd = noise_sd * (1.0 + (event.size - 1.0) * weight)
            elif event.kind == "sensor_outliers":
                covered = np.flatnonzero(weight > 0)
                n_bad = round(event.share_of_days * len(covered))
                if n_bad:
                    bad = covered[np.argsort(outlier_rank_draw[covered], kind="stable")[:n_bad]]
                    high = event.size_high if event.size_high is not None else event.size
                    target = event.size + (high - event.size) * outlier_size_draw[bad]
                    # d heat / d wind on that day: the reading error that yields `target` SDs
                    sensitivity = site.wind_slope + site.wind_chill * gap[bad]
                    spike = target * noise_sd[bad] / np.maximum(sensitivity, 1e-9)
                    recorded_wind[bad] = np.round(
                        np.minimum(true_wind[bad] + spike, _MAX_WIND_READING), 1)
            else:  # pragma: no cover - the scenario's kinds are fixed above
                raise AssertionError(f"unknown event kind {event.kind!r}")

        sunshine = city["sunshine"]
        mean = (site.base_mwh + temp_slope * gap
                + true_wind * (site.wind_slope + site.wind_chill * gap)
                - site.sun_effect * sunshine - site.day_off_effect * day_off + level)
        heat = np.maximum(np.round(mean + noise_sd * noise, 3), 0.0)
        frames.append(pd.DataFrame({
            "row_id": np.arange(days, dtype=np.int64) * len(SUBSTATIONS) + position + 1,
            "reading_date": dates,
            "substation": name,
            "heat_mwh": heat,
            "outdoor_temp_c": temperature,
            "wind_m_s": recorded_wind,
            "sunshine_h": sunshine,
            "weekend_or_holiday": day_off,
            "true_mean_mwh": mean,
            "true_noise_sd_mwh": noise_sd,
            "true_wind_m_s": true_wind,
        }))
    frame = pd.concat(frames, ignore_index=True)
    return frame.sort_values(["reading_date", "row_id"], ignore_index=True)


def simulate(*, seed: int = DEFAULT_SEED, start: dt.date = START, days: int = DAYS,
             substations: Sequence[str] = SUBSTATION_NAMES) -> pd.DataFrame:
    """All rows of the scenario as one frame, with the generator's truth beside them.

    Besides the stored columns (see :data:`STORED_COLUMNS`), the frame holds
    ``true_mean_mwh`` (the noise-free heat), ``true_noise_sd_mwh`` and
    ``true_wind_m_s`` (the wind before a failing sensor corrupts it).  The stores
    never contain these: a real pipeline would not know them.  Rows are sorted
    by day, then by ``row_id``.  Deterministic for a seed; fast enough to call
    for every append (the last few results are cached).
    """
    if not isinstance(seed, (int, np.integer)) or isinstance(seed, bool) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    if not isinstance(days, (int, np.integer)) or isinstance(days, bool) or days < 1:
        raise ValueError(f"days must be a positive integer, got {days!r}")
    start = _as_day(start, "start")
    return _simulate_cached(int(seed), start, int(days), _check_substations(substations)).copy()


# ------------------------------------------------------------------------------------- stores


def _month_key(stamp: pd.Timestamp) -> str:
    return f"{stamp.year:04d}-{stamp.month:02d}"


def _stage_parquet(rows: pd.DataFrame, root: Path,
                   file_name: str | None) -> list[tuple[Path, Path]]:
    """Write ``rows`` into their substation/month partitions under hidden names.

    Returns ``(hidden, final)`` pairs for :func:`_publish`; ``file_name`` ``None``
    names each file after its first day.  Nothing is visible to readers yet.
    """
    plan: list[tuple[pd.DataFrame, Path]] = []
    months = rows["reading_date"].map(_month_key)
    for (name, month), part in rows.groupby([rows["substation"], months], sort=True):
        folder = root / f"substation={name}" / f"month={month}"
        target = folder / (file_name or f"part-{part['reading_date'].iloc[0]:%Y%m%d}.parquet")
        if target.exists():
            raise FileExistsError(f"{target} already exists; these days were written before")
        plan.append((part, target))
    staged: list[tuple[Path, Path]] = []
    for part, target in plan:
        target.parent.mkdir(parents=True, exist_ok=True)
        table = pa.Table.from_pandas(part[list(_FILE_SCHEMA.names)], schema=_FILE_SCHEMA,
                                     preserve_index=False)
        hidden = target.parent / f".{target.name}.writing"
        pq.write_table(table, hidden)
        staged.append((hidden, target))
    return staged


def _publish(staged: list[tuple[Path, Path]]) -> list[Path]:
    for hidden, target in staged:
        os.replace(hidden, target)
    return [target for _, target in staged]


def _readings_table(metadata: sa.MetaData) -> sa.Table:
    return sa.Table(
        TABLE_NAME, metadata,
        sa.Column("row_id", sa.Integer, primary_key=True, autoincrement=False),
        # SQLite has no zone-aware type: instants are stored as ISO text in UTC.
        sa.Column("reading_date", sa.DateTime, nullable=False),
        sa.Column("substation", sa.String(40), nullable=False),
        sa.Column("heat_mwh", sa.Float, nullable=False),
        sa.Column("outdoor_temp_c", sa.Float, nullable=False),
        sa.Column("wind_m_s", sa.Float, nullable=False),
        sa.Column("sunshine_h", sa.Float, nullable=False),
        sa.Column("weekend_or_holiday", sa.Integer, nullable=False),
        sa.UniqueConstraint("substation", "reading_date", name="one_reading_per_day"),
    )


def _sql_rows(rows: pd.DataFrame) -> list[dict[str, object]]:
    records = []
    for row in rows[list(STORED_COLUMNS)].itertuples(index=False):
        records.append({
            "row_id": int(row.row_id),
            "reading_date": row.reading_date.tz_convert("UTC").tz_localize(None).to_pydatetime(),
            "substation": str(row.substation),
            "heat_mwh": float(row.heat_mwh),
            "outdoor_temp_c": float(row.outdoor_temp_c),
            "wind_m_s": float(row.wind_m_s),
            "sunshine_h": float(row.sunshine_h),
            "weekend_or_holiday": int(row.weekend_or_holiday),
        })
    return records


def _insert_sqlite(rows: pd.DataFrame, path: Path, *, create: bool) -> None:
    engine = sa.create_engine(f"sqlite:///{path}")
    try:
        table = _readings_table(sa.MetaData())
        with engine.begin() as connection:
            if create:
                table.create(connection)
            if len(rows):
                connection.execute(table.insert(), _sql_rows(rows))
    finally:
        engine.dispose()


def _write_manifest(out_dir: Path, content: dict[str, object]) -> None:
    hidden = out_dir / f".{MANIFEST_NAME}.writing"
    hidden.write_text(json.dumps(content, indent=2) + "\n", encoding="utf-8")
    os.replace(hidden, out_dir / MANIFEST_NAME)


def read_manifest(out_dir: str | os.PathLike[str]) -> GeneratedData:
    """Describe the stores under ``out_dir`` from their manifest."""
    out = Path(out_dir)
    path = out / MANIFEST_NAME
    if not path.is_file():
        raise FileNotFoundError(f"{path} not found; run generate({os.fspath(out)!r}) first")
    content = json.loads(path.read_text(encoding="utf-8"))
    if content.get("format") != _MANIFEST_FORMAT:
        raise ValueError(f"{path} has format {content.get('format')!r}, this generator reads "
                         f"format {_MANIFEST_FORMAT}; generate the data again")
    first = dt.date.fromisoformat(content["first_day"])
    substations = tuple(content["substations"])
    return GeneratedData(
        out_dir=out,
        parquet_dir=out / PARQUET_DIR_NAME if content["parquet"] else None,
        sqlite_path=out / SQLITE_NAME if content["sqlite"] else None,
        table=TABLE_NAME,
        seed=int(content["seed"]),
        substations=substations,
        first_day=first,
        last_day=first + dt.timedelta(days=int(content["days"]) - 1),
        written_through=dt.date.fromisoformat(content["written_through"]),
        rows_written=int(content["rows_written"]),
        events=tuple(e for e in EVENTS if e.substation in substations),
    )


def generate(out_dir: str | os.PathLike[str], *, seed: int = DEFAULT_SEED,
             start: dt.date = START, days: int = DAYS,
             substations: Sequence[str] = SUBSTATION_NAMES, parquet: bool = True,
             sqlite: bool = True, as_of: dt.date | None = None,
             overwrite: bool = False) -> GeneratedData:
    """Write the invented readings to a Parquet dataset and a SQLite table.

    Parameters
    ----------
    out_dir
        Folder to write into (created if missing).
    seed, start, days, substations
        The draw and the span; the defaults are the demo's data set (1096 days
        from 2022-01-01 for the five substations of the scenario).
    parquet, sqlite
        Which stores to write.
    as_of
        Last day to write (inclusive); ``None`` writes the whole span.  Later
        days can be added with :func:`append_days` / :func:`append_day`.
    overwrite
        Replace stores already in ``out_dir``; without it they are an error.

    Raises
    ------
    FileExistsError
        ``out_dir`` already holds stores and ``overwrite`` is false.
    ValueError
        A bad argument; the message names it.
    """
    if not (parquet or sqlite):
        raise ValueError("parquet and sqlite are both false; ask for at least one store")
    frame = simulate(seed=seed, start=start, days=days, substations=substations)
    first = _as_day(start, "start")
    last = first + dt.timedelta(days=int(days) - 1)
    through = last if as_of is None else _as_day(as_of, "as_of")
    if not first <= through <= last:
        raise ValueError(f"as_of {through} lies outside the generated span {first}..{last}")

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    parquet_dir, sqlite_path = out / PARQUET_DIR_NAME, out / SQLITE_NAME
    existing = [p for p in (parquet_dir, sqlite_path, out / MANIFEST_NAME) if p.exists()]
    if existing and not overwrite:
        raise FileExistsError(f"{', '.join(map(os.fspath, existing))} already exist; pass "
                              "overwrite=True (--overwrite) or choose another folder")
    if parquet_dir.exists():
        shutil.rmtree(parquet_dir)
    for path in (sqlite_path, out / MANIFEST_NAME):
        path.unlink(missing_ok=True)

    end_stamp = pd.Timestamp(through, tz="UTC") + pd.Timedelta(days=1)
    rows = frame[frame["reading_date"] < end_stamp]
    staged = _stage_parquet(rows, parquet_dir, "part-0.parquet") if parquet else []
    if sqlite:
        _insert_sqlite(rows, sqlite_path, create=True)
    _publish(staged)
    names = _check_substations(substations)
    _write_manifest(out, {
        "format": _MANIFEST_FORMAT,
        "note": "INVENTED demo data written by example_pipeline.generate",
        "seed": int(seed), "first_day": first.isoformat(), "days": int(days),
        "substations": list(names), "parquet": bool(parquet), "sqlite": bool(sqlite),
        "written_through": through.isoformat(), "rows_written": len(rows),
    })
    return read_manifest(out)


def append_days(out_dir: str | os.PathLike[str], through: dt.date) -> Appended:
    """Append every day after the stores' last day up to ``through`` (inclusive).

    Each store gets the rows a full generation would hold for those days: one
    new Parquet file per substation and month touched
    (``part-<yyyymmdd of its first day>.parquet``) and one SQLite transaction.
    The manifest is updated last.
    """
    state = read_manifest(out_dir)
    through = _as_day(through, "through")
    first = state.written_through + dt.timedelta(days=1)
    if through < first:
        raise ValueError(f"the stores already hold every day through {state.written_through}; "
                         f"nothing to append through {through}")
    if through > state.last_day:
        raise ValueError(f"{through} lies after the generated span, which ends "
                         f"{state.last_day}; generate a longer span (days=...)")
    frame = simulate(seed=state.seed, start=state.first_day,
                     days=(state.last_day - state.first_day).days + 1,
                     substations=state.substations)
    low = pd.Timestamp(first, tz="UTC")
    high = pd.Timestamp(through, tz="UTC") + pd.Timedelta(days=1)
    rows = frame[(frame["reading_date"] >= low) & (frame["reading_date"] < high)]
    # Stage the Parquet files first, so a failure of either store leaves both unchanged
    # (short of a crash between the SQLite commit and the renames).
    staged = [] if state.parquet_dir is None else _stage_parquet(rows, state.parquet_dir, None)
    try:
        if state.sqlite_path is not None:
            _insert_sqlite(rows, state.sqlite_path, create=False)
    except BaseException:
        for hidden, _ in staged:
            hidden.unlink(missing_ok=True)
        raise
    files = _publish(staged)
    manifest = json.loads((state.out_dir / MANIFEST_NAME).read_text(encoding="utf-8"))
    manifest["written_through"] = through.isoformat()
    manifest["rows_written"] = state.rows_written + len(rows)
    _write_manifest(state.out_dir, manifest)
    return Appended(first, through, len(rows), tuple(files))


def append_day(out_dir: str | os.PathLike[str], day: dt.date) -> Appended:
    """Append one day's rows (one per substation); ``day`` must follow the last day stored."""
    state = read_manifest(out_dir)
    day = _as_day(day, "day")
    expected = state.written_through + dt.timedelta(days=1)
    if day != expected:
        raise ValueError(f"cannot append {day}: the stores end on {state.written_through}, so "
                         f"the next day to append is {expected}")
    return append_days(out_dir, day)


# ------------------------------------------------------------------------------- command line


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m example_pipeline.generate OUT_DIR``: write (or extend) the demo data."""
    parser = argparse.ArgumentParser(
        prog="python -m example_pipeline.generate",
        description="Write the INVENTED district-heating readings of the regwarden demo "
                    "(Parquet dataset and SQLite table), or append days to them.")
    parser.add_argument("out_dir", help="folder for readings/, readings.sqlite, generated.json")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    parser.add_argument("--start", default=START.isoformat(), help="first day, YYYY-MM-DD")
    parser.add_argument("--days", type=int, default=DAYS, help="length of the span in days")
    parser.add_argument("--substations", default=",".join(SUBSTATION_NAMES),
                        help="comma-separated subset of " + ", ".join(SUBSTATION_NAMES))
    parser.add_argument("--as-of", help="last day to write now, YYYY-MM-DD (default: all)")
    parser.add_argument("--no-parquet", action="store_true", help="skip the Parquet dataset")
    parser.add_argument("--no-sqlite", action="store_true", help="skip the SQLite table")
    parser.add_argument("--overwrite", action="store_true", help="replace existing stores")
    parser.add_argument("--append-through", metavar="DAY",
                        help="instead of generating, append days to existing stores "
                             "through DAY")
    options = parser.parse_args(argv)
    try:
        if options.append_through:
            added = append_days(options.out_dir, _as_day(options.append_through,
                                                         "--append-through"))
            print(f"appended {added.rows} rows for {added.first_day}..{added.last_day} "
                  f"({len(added.parquet_files)} Parquet files) to {options.out_dir}")
            return 0
        result = generate(
            options.out_dir, seed=options.seed, start=_as_day(options.start, "--start"),
            days=options.days,
            substations=tuple(s.strip() for s in options.substations.split(",") if s.strip()),
            parquet=not options.no_parquet, sqlite=not options.no_sqlite,
            as_of=None if options.as_of is None else _as_day(options.as_of, "--as-of"),
            overwrite=options.overwrite)
    except (ValueError, TypeError, FileExistsError, FileNotFoundError) as error:
        print(f"error: {error}", file=sys.stderr)
        return 2
    print(f"INVENTED demo data, seed {result.seed}: {result.rows_written} rows, "
          f"{len(result.substations)} substations, {result.first_day}..{result.written_through}"
          f" (span ends {result.last_day})")
    if result.parquet_dir is not None:
        print(f"  Parquet dataset: {result.parquet_dir}")
    if result.sqlite_path is not None:
        print(f"  SQLite table {result.table}: {result.sqlite_path}")
    for event in result.events:
        end = event.end.isoformat() if event.end else "end of data"
        print(f"  planted: {event.start}..{end}  {event.substation:<13} {event.title}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
