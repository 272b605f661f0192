"""The demo's data generator: INVENTED district-heating readings with planted events.

The data here are invented (``example_pipeline/scenario.py``); these tests check
that the generator writes what its README promises, not any statistic of
regwarden.  Event sizes are checked with plain least squares (``numpy.linalg.lstsq``)
on the stored rows.

Tolerance of the event checks: 4 standard errors of the estimated change.  The
data are one fixed draw, so nothing can flake; 4 SE is wide enough that any
other seed passes each check with probability about 0.99994 (two-sided normal
tail beyond 4).  It is narrow enough to catch a missing event, a wrong sign,
or a slope change, level shift or outlier size off by a factor of two.  The
variance regime is the weakest: 92 summer days give the log of the SD ratio a
standard error of about 0.083, so the band is a ratio of 1.44 to 2.78 around
the stated 2; it catches a missing regime or a ratio of 4, not a ratio of 1.6.
"""

from __future__ import annotations

import datetime as dt
import sqlite3
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

import example_pipeline.generate as generator
from example_pipeline.generate import (
    STORED_COLUMNS,
    append_day,
    append_days,
    generate,
    read_manifest,
    simulate,
)
from example_pipeline.scenario import (
    DAYS,
    EVENTS,
    START,
    SUBSTATION_NAMES,
    SUBSTATIONS,
    events_for,
    substation,
)

FAMILY_FILE = Path(generator.__file__).with_name("family.toml")
CHOSEN_TERMS = ("outdoor_temp_c", "weekend_or_holiday", "sunshine_h", "wind_m_s",
                "outdoor_temp_c:wind_m_s")
TOLERANCE_SE = 4.0  # see the module docstring


# ------------------------------------------------------------------------------------ helpers


def _event(key: str):
    return next(event for event in EVENTS if event.key == key)


def _utc(day: str | dt.date) -> pd.Timestamp:
    return pd.Timestamp(day, tz="UTC")


def _window(frame: pd.DataFrame, name: str, first: str | dt.date,
            last: str | dt.date) -> pd.DataFrame:
    """Rows of one substation from ``first`` to ``last`` inclusive."""
    rows = frame[(frame["substation"] == name) & (frame["reading_date"] >= _utc(first))
                 & (frame["reading_date"] <= _utc(last))]
    return rows.sort_values("reading_date")


def _design(rows: pd.DataFrame, terms=CHOSEN_TERMS) -> np.ndarray:
    columns = [np.ones(len(rows))]
    for term in terms:
        factors = term.split(":")
        value = np.ones(len(rows))
        for factor in factors:
            value = value * rows[factor].to_numpy(dtype=np.float64)
        columns.append(value)
    return np.column_stack(columns)


class _Fit:
    """Ordinary least squares by ``numpy.linalg.lstsq`` with classical standard errors."""

    def __init__(self, X: np.ndarray, y: np.ndarray) -> None:
        self.beta, _, rank, _ = np.linalg.lstsq(X, y, rcond=None)
        assert rank == X.shape[1]
        residuals = y - X @ self.beta
        self.df_resid = len(y) - X.shape[1]
        self.s = float(np.sqrt(residuals @ residuals / self.df_resid))
        self.se = self.s * np.sqrt(np.diag(np.linalg.inv(X.T @ X)))


def _fit(rows: pd.DataFrame, terms=CHOSEN_TERMS) -> _Fit:
    return _Fit(_design(rows, terms), rows["heat_mwh"].to_numpy())


def _read_parquet(root: Path) -> pd.DataFrame:
    table = ds.dataset(root, format="parquet", partitioning="hive").to_table()
    frame = table.to_pandas()
    frame["substation"] = frame["substation"].astype(str)
    return frame[list(STORED_COLUMNS)].sort_values("row_id", ignore_index=True)


def _read_sqlite(path: Path) -> pd.DataFrame:
    with sqlite3.connect(path) as connection:
        frame = pd.read_sql_query("SELECT * FROM daily_readings", connection)
    frame["reading_date"] = pd.to_datetime(frame["reading_date"]).dt.tz_localize("UTC")
    return frame[list(STORED_COLUMNS)].sort_values("row_id", ignore_index=True)


def _expected(through: dt.date | None = None) -> pd.DataFrame:
    frame = simulate()[list(STORED_COLUMNS)]
    if through is not None:
        frame = frame[frame["reading_date"] <= _utc(through)]
    return frame.sort_values("row_id", ignore_index=True)


def _same_rows(left: pd.DataFrame, right: pd.DataFrame) -> None:
    left, right = left.copy(), right.copy()
    for frame in (left, right):
        frame["reading_date"] = frame["reading_date"].astype("datetime64[us, UTC]")
        frame["weekend_or_holiday"] = frame["weekend_or_holiday"].astype(np.int64)
        frame["substation"] = frame["substation"].astype(object)
    pd.testing.assert_frame_equal(left.reset_index(drop=True), right.reset_index(drop=True),
                                  check_exact=True)


@pytest.fixture(scope="module")
def full(tmp_path_factory: pytest.TempPathFactory):
    """The default data set, written once for the module."""
    return generate(tmp_path_factory.mktemp("full"))


@pytest.fixture(scope="module")
def rows() -> pd.DataFrame:
    return simulate()


# ------------------------------------------------------------------------ determinism, shape


def test_same_seed_gives_identical_rows_and_another_seed_does_not():
    first = simulate(seed=11)
    generator._simulate_cached.cache_clear()
    again = simulate(seed=11)
    pd.testing.assert_frame_equal(first, again, check_exact=True)
    other = simulate(seed=12)
    assert not np.array_equal(first["heat_mwh"], other["heat_mwh"])


def test_two_generations_with_one_seed_write_identical_stores(tmp_path, full):
    generator._simulate_cached.cache_clear()
    again = generate(tmp_path / "again")
    _same_rows(_read_parquet(again.parquet_dir), _read_parquet(full.parquet_dir))
    _same_rows(_read_sqlite(again.sqlite_path), _read_sqlite(full.sqlite_path))


def test_a_substation_reads_the_same_whichever_others_are_generated():
    alone = simulate(substations=("linden-park",))
    together = simulate()
    together = together[together["substation"] == "linden-park"]
    _same_rows(alone[list(STORED_COLUMNS)].reset_index(drop=True),
               together[list(STORED_COLUMNS)].reset_index(drop=True))


def test_there_is_one_row_per_substation_per_day_at_midnight_utc(full, rows):
    assert full.rows_written == len(rows) == DAYS * len(SUBSTATION_NAMES) == 5480
    assert full.first_day == START == dt.date(2022, 1, 1)
    assert full.last_day == full.written_through == dt.date(2024, 12, 31)
    assert str(rows["reading_date"].dt.tz) == "UTC"
    assert (rows["reading_date"] == rows["reading_date"].dt.normalize()).all()
    for name in SUBSTATION_NAMES:
        dates = rows.loc[rows["substation"] == name, "reading_date"]
        assert len(dates) == DAYS
        assert (dates.diff().dropna() == pd.Timedelta(days=1)).all()
    assert rows["row_id"].is_unique


def test_values_are_physically_plausible(rows):
    assert rows["heat_mwh"].min() > 5.0
    assert rows["wind_m_s"].min() >= 0.0
    assert rows["sunshine_h"].between(0.0, 16.5).all()
    assert rows["outdoor_temp_c"].between(-20.0, 35.0).all()
    assert set(rows["weekend_or_holiday"].unique()) == {0, 1}
    saturday = rows[rows["reading_date"] == _utc("2022-01-08")]
    christmas_monday = rows[rows["reading_date"] == _utc("2023-12-25")]
    plain_tuesday = rows[rows["reading_date"] == _utc("2023-03-07")]
    assert (saturday["weekend_or_holiday"] == 1).all()
    assert (christmas_monday["weekend_or_holiday"] == 1).all()
    assert (plain_tuesday["weekend_or_holiday"] == 0).all()


def test_unknown_substations_and_bad_spans_are_refused_with_the_known_names(tmp_path):
    with pytest.raises(ValueError, match="linden-park"):
        simulate(substations=("elm-street",))
    with pytest.raises(ValueError, match="as_of 2025-01-01 lies outside"):
        generate(tmp_path, as_of=dt.date(2025, 1, 1))
    with pytest.raises(ValueError, match="at least one store"):
        generate(tmp_path, parquet=False, sqlite=False)


def test_generate_refuses_to_overwrite_stores_unless_asked(tmp_path):
    generate(tmp_path, days=40, substations=("millbrook",))
    with pytest.raises(FileExistsError, match="overwrite=True"):
        generate(tmp_path, days=40, substations=("millbrook",))
    again = generate(tmp_path, days=50, substations=("millbrook",), overwrite=True)
    assert again.rows_written == 50
    assert len(_read_sqlite(again.sqlite_path)) == len(_read_parquet(again.parquet_dir)) == 50


# ---------------------------------------------------------------------------------- the stores


def test_parquet_store_is_partitioned_by_substation_and_month(full):
    root = full.parquet_dir
    assert sorted(p.name for p in root.iterdir()) == sorted(
        f"substation={name}" for name in SUBSTATION_NAMES)
    for name in SUBSTATION_NAMES:
        months = sorted(p.name for p in (root / f"substation={name}").iterdir())
        assert len(months) == 36
        assert months[0] == "month=2022-01" and months[-1] == "month=2024-12"
    files = sorted(root.rglob("*.parquet"))
    assert len(files) == 36 * len(SUBSTATION_NAMES)
    assert {f.name for f in files} == {"part-0.parquet"}
    sample = root / "substation=harbour-row" / "month=2024-02" / "part-0.parquet"
    table = pq.read_table(sample)
    # partition keys live in the folder names only
    assert "substation" not in table.column_names and "month" not in table.column_names
    assert str(table.schema.field("reading_date").type) == "timestamp[us, tz=UTC]"
    dates = table.column("reading_date").to_pandas()
    assert len(dates) == 29  # 2024 is a leap year
    assert dates.min() == _utc("2024-02-01") and dates.max() == _utc("2024-02-29")


def test_a_month_filter_prunes_the_parquet_partitions(full):
    dataset = ds.dataset(full.parquet_dir, format="parquet", partitioning="hive")
    march = list(dataset.get_fragments(filter=ds.field("month") == "2024-03"))
    assert len(march) == len(SUBSTATION_NAMES)
    assert all("month=2024-03" in fragment.path for fragment in march)


def test_both_stores_hold_the_same_rows_as_the_simulation(full):
    expected = _expected()
    _same_rows(_read_parquet(full.parquet_dir), expected)
    _same_rows(_read_sqlite(full.sqlite_path), expected)


def test_sqlite_table_refuses_a_second_reading_for_a_day(full, tmp_path):
    copy = tmp_path / "copy.sqlite"
    copy.write_bytes(full.sqlite_path.read_bytes())
    with sqlite3.connect(copy) as connection, pytest.raises(sqlite3.IntegrityError):
        connection.execute(
            "INSERT INTO daily_readings VALUES (99999, '2022-01-01 00:00:00.000000', "
            "'millbrook', 1, 1, 1, 1, 0)")


# --------------------------------------------------------------------------- planted events


def test_insulation_changes_the_temperature_coefficient_by_its_stated_size(rows):
    """The slope is measured at a wind of 4 m/s: with the interaction centred there, the
    temperature coefficient is far less collinear with it (SE 0.03 instead of 0.06), and
    the insulation changes the slope by the same amount at every wind speed."""
    event = _event("insulation")
    site = substation(event.substation)
    centred = rows.assign(wind_minus_4=rows["wind_m_s"] - 4.0)
    terms = (*CHOSEN_TERMS[:-1], "outdoor_temp_c:wind_minus_4")
    before = _fit(_window(centred, event.substation, "2022-05-01", "2023-04-30"), terms)
    after = _fit(_window(centred, event.substation, "2023-10-01", "2024-09-30"), terms)
    change = after.beta[1] - before.beta[1]
    se = float(np.hypot(before.se[1], after.se[1]))
    assert abs(change - event.size) < TOLERANCE_SE * se, (change, se)
    assert change > TOLERANCE_SE * se  # visible, not noise
    # the stated values: -2.20 -> -1.75 MWh/day per °C at no wind, minus 0.10 x 4 m/s
    slope_at_4 = -(site.temp_slope + 4.0 * site.wind_chill)
    assert abs(before.beta[1] - slope_at_4) < TOLERANCE_SE * before.se[1]
    assert abs(after.beta[1] - (slope_at_4 + event.size)) < TOLERANCE_SE * after.se[1]
    # about one noise SD per SD of temperature, as the README says
    spread = _window(rows, event.substation, "2022-05-01", "2023-04-30")["outdoor_temp_c"].std()
    assert event.size * spread / site.noise_sd == pytest.approx(event.size_in_noise_sd, abs=0.1)


def test_failing_wind_sensor_gives_outliers_on_a_tenth_of_its_days_only(rows):
    event = _event("wind-sensor")
    baseline = _fit(_window(rows, event.substation, "2022-12-04", "2023-12-03"))
    during = _window(rows, event.substation, event.start, event.end)
    residuals = (during["heat_mwh"].to_numpy() - _design(during) @ baseline.beta) / baseline.s
    flagged = set(during["reading_date"][np.abs(residuals) > 4.0])
    planted = set(during["reading_date"][during["wind_m_s"] != during["true_wind_m_s"]])
    assert len(during) == 70 and len(planted) == round(event.share_of_days * 70) == 7
    assert flagged == planted
    # over-predicted by 6-10 noise SD, give or take the day's own noise (±3.5 SD)
    planted_residuals = residuals[np.abs(residuals) > 4.0]
    assert (planted_residuals < -(event.size - 3.5)).all()
    assert (planted_residuals > -(event.size_high + 3.5)).all()
    # the replaced sensor reads true again
    after = _window(rows, event.substation, event.end + dt.timedelta(days=1), "2024-05-31")
    later = (after["heat_mwh"].to_numpy() - _design(after) @ baseline.beta) / baseline.s
    assert np.abs(later).max() < 4.0


def test_summer_regime_doubles_the_noise_sd(rows):
    event = _event("summer-regime")
    baseline = _fit(_window(rows, event.substation, "2023-06-01", "2024-05-31"))
    summer = _window(rows, event.substation, event.start, event.end)
    residuals = summer["heat_mwh"].to_numpy() - _design(summer) @ baseline.beta
    ratio = float(np.sqrt(np.mean(residuals**2))) / baseline.s
    # SE of log(sd ratio) ~ sqrt(1/(2 n1) + 1/(2 df)) for normal samples (delta method)
    se_log = np.sqrt(1 / (2 * len(summer)) + 1 / (2 * baseline.df_resid))
    assert abs(np.log(ratio / event.size)) < TOLERANCE_SE * se_log, ratio
    assert np.log(ratio) > TOLERANCE_SE * se_log
    autumn = _window(rows, event.substation, "2024-09-01", "2024-12-31")
    calm = autumn["heat_mwh"].to_numpy() - _design(autumn) @ baseline.beta
    se_log = np.sqrt(1 / (2 * len(autumn)) + 1 / (2 * baseline.df_resid))
    assert abs(np.log(np.sqrt(np.mean(calm**2)) / baseline.s)) < TOLERANCE_SE * se_log


def test_new_building_shifts_the_level_by_its_stated_size(rows):
    event = _event("new-pool")
    around = _window(rows, event.substation, "2022-03-06", "2024-03-05")
    step = (around["reading_date"] >= _utc(event.start)).to_numpy(dtype=np.float64)
    X = np.column_stack([_design(around), step])
    fit = _Fit(X, around["heat_mwh"].to_numpy())
    assert abs(fit.beta[-1] - event.size) < TOLERANCE_SE * fit.se[-1], (fit.beta[-1], fit.se[-1])
    assert event.size / substation(event.substation).noise_sd == pytest.approx(
        event.size_in_noise_sd, abs=0.01)


@pytest.mark.parametrize("name", [s.name for s in SUBSTATIONS])
def test_each_substation_is_stable_before_its_first_event(rows, name):
    """Coefficients of the first and of the last event-free year agree within 4 SE."""
    events = events_for(name)
    stable_end = events[0].start - dt.timedelta(days=1) if events else dt.date(2024, 12, 31)
    if name == "linden-park":
        assert events == ()
    first = _fit(_window(rows, name, START, START + dt.timedelta(days=364)))
    last = _fit(_window(rows, name, stable_end - dt.timedelta(days=364), stable_end))
    z = (last.beta - first.beta) / np.hypot(first.se, last.se)
    assert np.abs(z).max() < TOLERANCE_SE, z
    truth = substation(name).coefficients()
    expected = np.array([truth["Intercept"], *(truth[t] for t in CHOSEN_TERMS)])
    assert np.abs((first.beta - expected) / first.se).max() < TOLERANCE_SE


def test_event_free_substation_has_no_outliers_or_variance_change(rows):
    baseline = _fit(_window(rows, "linden-park", "2022-01-01", "2022-12-31"))
    later = _window(rows, "linden-park", "2023-01-01", "2024-12-31")
    residuals = (later["heat_mwh"].to_numpy() - _design(later) @ baseline.beta) / baseline.s
    # 730 standard normal draws: |z| > 4.5 has probability ~5e-3 over all of them
    assert np.abs(residuals).max() < 4.5
    se_log = np.sqrt(1 / (2 * len(later)) + 1 / (2 * baseline.df_resid))
    assert abs(np.log(np.sqrt(np.mean(residuals**2)))) < TOLERANCE_SE * se_log


def test_events_are_described_with_dates_sizes_and_signals():
    assert {event.substation for event in EVENTS} == set(SUBSTATION_NAMES) - {"linden-park"}
    assert len({event.substation for event in EVENTS}) == len(EVENTS)  # one event each
    for event in EVENTS:
        assert START < event.start and (event.end is None or event.start < event.end)
        assert event.expected_signals and event.size > 0


# --------------------------------------------------------------------------------- the family


def test_family_file_holds_growing_candidates_with_one_interaction(rows):
    from monitor import parse_formula

    family = tomllib.loads(FAMILY_FILE.read_text(encoding="utf-8"))
    assert family["response"] == "heat_mwh" and family["criterion"] == "aic"
    assert family["alpha"] == 0.05 and family["margin"] == 2.0
    candidates = family["candidates"]
    assert 4 <= len(candidates) <= 6 and family["chosen"] in candidates
    previous: set[tuple[str, ...]] = set()
    interactions = 0
    for formula in candidates.values():
        parsed = parse_formula(formula)
        assert parsed.response.label == "heat_mwh"
        assert set(parsed.columns) <= set(STORED_COLUMNS)
        terms = {tuple(f.label for f in term) for term in parsed.terms}
        assert previous < terms  # each candidate adds to the one before
        interactions += sum(len(term) > 1 for term in terms - previous)
        previous = terms
    assert interactions == 1
    chosen_terms = {":".join(f.label for f in term)
                    for term in parse_formula(candidates[family["chosen"]]).terms}
    assert chosen_terms == set(CHOSEN_TERMS)


def test_chosen_candidate_has_the_lowest_aic_in_every_first_year(rows):
    """AIC up to a constant: n log(SSR/n) + 2p (the constant cancels within a substation)."""
    family = tomllib.loads(FAMILY_FILE.read_text(encoding="utf-8"))
    for name in SUBSTATION_NAMES:
        year = _window(rows, name, "2022-01-01", "2022-12-31")
        y = year["heat_mwh"].to_numpy()
        scores = {}
        for label, formula in family["candidates"].items():
            terms = [t.strip() for t in formula.split("~")[1].split("+")]
            X = _design(year, terms)
            beta = np.linalg.lstsq(X, y, rcond=None)[0]
            ssr = float(np.sum((y - X @ beta) ** 2))
            scores[label] = len(y) * np.log(ssr / len(y)) + 2 * X.shape[1]
        best_other = min(v for k, v in scores.items() if k != family["chosen"])
        assert scores[family["chosen"]] < best_other - family["margin"], (name, scores)


# ------------------------------------------------------------------------------------ appends


def test_append_day_adds_exactly_one_day_to_both_stores(tmp_path):
    state = generate(tmp_path, as_of=dt.date(2023, 1, 31))
    assert state.written_through == dt.date(2023, 1, 31)
    _same_rows(_read_sqlite(state.sqlite_path), _expected(dt.date(2023, 1, 31)))
    added = append_day(tmp_path, dt.date(2023, 2, 1))
    assert added.rows == len(SUBSTATION_NAMES)
    assert added.first_day == added.last_day == dt.date(2023, 2, 1)
    assert sorted(p.relative_to(state.parquet_dir).as_posix() for p in added.parquet_files) == [
        f"substation={name}/month=2023-02/part-20230201.parquet"
        for name in sorted(SUBSTATION_NAMES)]
    expected = _expected(dt.date(2023, 2, 1))
    _same_rows(_read_parquet(state.parquet_dir), expected)
    _same_rows(_read_sqlite(state.sqlite_path), expected)
    assert read_manifest(tmp_path).written_through == dt.date(2023, 2, 1)
    assert read_manifest(tmp_path).rows_written == len(expected)
    assert not list(state.parquet_dir.rglob(".*"))  # no hidden leftovers


def test_appends_out_of_order_are_refused_and_change_nothing(tmp_path):
    state = generate(tmp_path, as_of=dt.date(2023, 1, 31), substations=("millbrook",))
    with pytest.raises(ValueError, match="next day to append is 2023-02-01"):
        append_day(tmp_path, dt.date(2023, 1, 31))
    with pytest.raises(ValueError, match="next day to append is 2023-02-01"):
        append_day(tmp_path, dt.date(2023, 2, 3))
    with pytest.raises(ValueError, match="after the generated span"):
        append_days(tmp_path, dt.date(2025, 1, 1))
    with pytest.raises(ValueError, match="already hold every day"):
        append_days(tmp_path, dt.date(2023, 1, 1))
    assert len(_read_sqlite(state.sqlite_path)) == len(_read_parquet(state.parquet_dir)) == 396
    assert read_manifest(tmp_path).written_through == dt.date(2023, 1, 31)


def test_a_failed_sqlite_insert_leaves_the_parquet_store_unchanged(tmp_path):
    state = generate(tmp_path, as_of=dt.date(2023, 1, 31), substations=("millbrook",))
    with sqlite3.connect(state.sqlite_path) as connection:  # someone else wrote that day
        connection.execute("INSERT INTO daily_readings VALUES (99999, "
                           "'2023-02-01 00:00:00.000000', 'millbrook', 1, 1, 1, 1, 0)")
    with pytest.raises(Exception, match="UNIQUE"):
        append_day(tmp_path, dt.date(2023, 2, 1))
    assert len(_read_parquet(state.parquet_dir)) == 396
    assert not list(state.parquet_dir.rglob("*20230201*"))
    assert read_manifest(tmp_path).written_through == dt.date(2023, 1, 31)


def test_append_days_across_a_month_matches_a_full_generation(tmp_path):
    state = generate(tmp_path, as_of=dt.date(2023, 2, 20))
    added = append_days(tmp_path, dt.date(2023, 3, 10))
    assert added.rows == 18 * len(SUBSTATION_NAMES)
    names = {p.relative_to(state.parquet_dir).parent.name + "/" + p.name
             for p in added.parquet_files}
    assert names == {"month=2023-02/part-20230221.parquet", "month=2023-03/part-20230301.parquet"}
    expected = _expected(dt.date(2023, 3, 10))
    _same_rows(_read_parquet(state.parquet_dir), expected)
    _same_rows(_read_sqlite(state.sqlite_path), expected)


def test_parquet_only_store_can_be_appended(tmp_path):
    state = generate(tmp_path, as_of=dt.date(2024, 12, 30), sqlite=False,
                     substations=("quarry-hill",))
    assert state.sqlite_path is None and not (tmp_path / "readings.sqlite").exists()
    append_day(tmp_path, dt.date(2024, 12, 31))
    assert len(_read_parquet(state.parquet_dir)) == DAYS


# ------------------------------------------------------------------------------ command line


def test_command_line_generates_then_appends(tmp_path, capsys):
    out = tmp_path / "demo"
    assert generator.main([str(out), "--as-of", "2022-03-31", "--substations",
                           "millbrook,linden-park", "--no-parquet"]) == 0
    printed = capsys.readouterr().out
    assert "INVENTED" in printed and "180 rows" in printed and "millbrook" in printed
    assert generator.main([str(out), "--append-through", "2022-04-02"]) == 0
    assert "appended 4 rows for 2022-04-01..2022-04-02" in capsys.readouterr().out
    assert generator.main([str(out)]) == 2
    assert "already exist" in capsys.readouterr().err
