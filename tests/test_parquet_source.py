"""Parquet source: pruning, schema checks naming the file, time order, incremental ledger."""

from __future__ import annotations

import datetime as dt
import os
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from monitor.errors import ConfigurationError, DataValidationError, SourceError
from storage.history import HistoryStore, RunRecord
from storage.sources import ParquetSource

UTC = dt.UTC
DAY0 = dt.datetime(2030, 6, 1)


def _day_table(day: int, rows: int = 48, *, shift_hours: float = 0.0) -> pa.Table:
    """Rows every 30 minutes of one day (naive timestamps = UTC), x = running number."""
    start = np.datetime64(DAY0 + dt.timedelta(days=day, hours=shift_hours), "us")
    times = start + np.arange(rows) * np.timedelta64(30, "m")
    return pa.table({"ts": pa.array(times, pa.timestamp("us")),
                     "units sold": pa.array(np.arange(rows, dtype=np.float64) + 100 * day),
                     "price": pa.array(np.full(rows, 2.5 + day))})


@pytest.fixture
def daily(tmp_path: Path) -> Path:
    """Ten Hive partitions day=2030-06-01..10, one file each, row groups of 16 rows."""
    root = tmp_path / "sales"
    for day in range(10):
        folder = root / f"day={(DAY0 + dt.timedelta(days=day)).date().isoformat()}"
        folder.mkdir(parents=True)
        pq.write_table(_day_table(day), folder / "part-0.parquet", row_group_size=16)
    return root


def _at(day: int, hour: int = 0) -> dt.datetime:
    return (DAY0 + dt.timedelta(days=day, hours=hour)).replace(tzinfo=UTC)


def _rows(scan) -> pa.Table:  # type: ignore[no-untyped-def]
    return pa.Table.from_batches(list(scan))


def test_pruning_reads_only_the_partitions_in_the_window(daily: Path) -> None:
    source = ParquetSource(daily, time_column="ts", time_partition="day")
    scan = source.scan(["ts", "units sold"], _at(3), _at(6))
    assert scan.files_considered == 3
    assert [Path(path).parent.name for path in scan.files] == [
        "day=2030-06-04", "day=2030-06-05", "day=2030-06-06"]
    # a corrupt file in a partition outside the window is never opened
    (daily / "day=2030-06-09" / "part-0.parquet").write_bytes(b"not parquet at all")
    table = _rows(source.scan(["ts", "units sold"], _at(3), _at(6)))
    assert table.num_rows == 3 * 48
    assert table.column("ts")[0].as_py() == _at(3)
    assert table.column("ts")[-1].as_py() == _at(6) - dt.timedelta(minutes=30)


def test_month_partitions_cover_their_whole_month(tmp_path: Path) -> None:
    """A window starting mid-month keeps that month's folder and all its rows in the window."""
    root = tmp_path / "monthly"
    for month, first_day in (("2030-06", 0), ("2030-07", 30), ("2030-08", 61)):
        folder = root / f"month={month}"
        folder.mkdir(parents=True)
        days = range(first_day, first_day + (30 if month == "2030-06" else 31))
        pq.write_table(pa.concat_tables([_day_table(day, rows=2) for day in days]),
                       folder / "part-0.parquet")
    source = ParquetSource(root, time_column="ts", time_partition="month",
                           time_partition_format="%Y-%m")
    scan = source.scan(["ts"], _at(10), _at(40))  # 2030-06-11 .. 2030-07-11 (excluded)
    table = _rows(scan)
    assert scan.files_considered == 2  # August is pruned without opening it
    assert table.num_rows == 30 * 2
    assert table.column("ts")[0].as_py() == _at(10)


def test_without_partition_pruning_file_statistics_skip_files(daily: Path) -> None:
    scan = ParquetSource(daily, time_column="ts").scan(["price"], _at(3, 12), _at(5))
    assert scan.files_considered == 10 and len(scan.files) == 2
    assert _rows(scan).num_rows == 48 + 24


def test_batches_have_exactly_the_requested_columns_and_size(daily: Path) -> None:
    source = ParquetSource(daily, time_column="ts", batch_rows=10)
    scan = source.scan(["units sold", "ts", "day"], _at(0), _at(2))
    batches = list(scan)
    assert all(batch.schema.names == ["units sold", "ts", "day"] for batch in batches)
    assert max(batch.num_rows for batch in batches) <= 10
    assert batches[0].schema.field("ts").type == pa.timestamp("us", tz="UTC")
    assert scan.rows == 96 and scan.in_time_order
    assert scan.max_time == _at(1, 23) + dt.timedelta(minutes=30)


def test_a_scan_can_be_read_twice_with_the_same_rows(daily: Path) -> None:
    scan = ParquetSource(daily, time_column="ts").scan(["ts", "price"], _at(1), _at(4))
    assert _rows(scan).equals(_rows(scan))
    assert scan.passes == 2


def test_window_bounds_in_another_zone_select_the_same_instants(daily: Path) -> None:
    """Naive data timestamps are UTC; a bound at 02:00+02:00 is midnight UTC."""
    plus_two = dt.timezone(dt.timedelta(hours=2))
    start = dt.datetime(2030, 6, 3, 2, 0, tzinfo=plus_two)
    table = _rows(ParquetSource(daily, time_column="ts").scan(["ts"], start, _at(3)))
    assert table.num_rows == 48 and table.column("ts")[0].as_py() == _at(2)


def test_overlapping_files_are_sorted_when_the_window_fits_the_budget(tmp_path: Path) -> None:
    root = tmp_path / "overlap"
    root.mkdir()
    pq.write_table(_day_table(0, 48), root / "a.parquet")
    pq.write_table(_day_table(0, 48, shift_hours=0.25), root / "b.parquet")
    source = ParquetSource(root, time_column="ts", batch_rows=16)
    scan = source.scan(["ts", "units sold"])
    assert scan.will_sort and scan.in_time_order
    times = _rows(scan).column("ts")
    assert len(times) == 96
    assert pc.all(pc.less_equal(times[:-1], times[1:])).as_py()
    assert scan.in_time_order


def test_overlapping_files_over_the_budget_are_flagged_not_in_time_order(
        tmp_path: Path) -> None:
    root = tmp_path / "overlap"
    root.mkdir()
    pq.write_table(_day_table(0, 48), root / "a.parquet")
    pq.write_table(_day_table(0, 48, shift_hours=0.25), root / "b.parquet")
    scan = ParquetSource(root, time_column="ts", memory_budget_bytes=64).scan(["ts"])
    assert not scan.in_time_order
    assert _rows(scan).num_rows == 96
    assert not scan.in_time_order


def test_rows_out_of_order_inside_a_file_are_found_and_sorted_on_the_next_pass(
        tmp_path: Path, rng: np.random.Generator) -> None:
    table = _day_table(0, 64)
    shuffled = table.take(pa.array(rng.permutation(64)))
    path = tmp_path / "shuffled.parquet"
    pq.write_table(shuffled, path, write_statistics=False)
    scan = ParquetSource(path, time_column="ts").scan(["ts", "units sold"])
    first = _rows(scan)
    assert not scan.in_time_order  # pass 1 delivered the rows as stored
    second = _rows(scan)
    assert scan.in_time_order  # pass 2 sorted them in memory
    assert second.equals(table.select(["ts", "units sold"]).cast(second.schema))
    assert sorted(first.column("units sold").to_pylist()) == \
        second.column("units sold").to_pylist()


@pytest.mark.parametrize("damage", ["garbage", "truncated"])
def test_a_corrupt_or_half_written_file_is_named(daily: Path, damage: str) -> None:
    path = daily / "day=2030-06-05" / "part-0.parquet"
    if damage == "garbage":
        path.write_bytes(b"\x00" * 200)
    else:
        path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    source = ParquetSource(daily, time_column="ts", time_partition="day")
    with pytest.raises(SourceError, match="day=2030-06-05") as raised:
        source.scan(["ts", "price"], _at(2), _at(6))
    assert raised.value.context["file"] == str(path)
    assert "corrupt or half-written" in str(raised.value)
    with pytest.raises(SourceError, match="day=2030-06-05"):
        source.check()


def test_a_corrupt_first_file_is_named_too(tmp_path: Path) -> None:
    root = tmp_path / "flat"
    root.mkdir()
    (root / "a.parquet").write_bytes(b"PAR1 half")
    pq.write_table(_day_table(1), root / "b.parquet")
    with pytest.raises(SourceError, match="a.parquet"):
        ParquetSource(root, time_column="ts").scan(["ts"])


def test_a_missing_column_names_the_file_and_the_column(daily: Path) -> None:
    path = daily / "day=2030-06-04" / "part-0.parquet"
    pq.write_table(_day_table(3).drop_columns(["price"]), path)
    source = ParquetSource(daily, time_column="ts", schema={"price": "number"})
    with pytest.raises(DataValidationError, match="'price' is missing") as raised:
        source.scan(["ts", "price"])
    assert raised.value.context == {"file": str(path), "column": "price"}


@pytest.mark.parametrize("declared", [True, False], ids=["declared", "first-file"])
def test_a_changed_type_names_the_file_and_the_column(daily: Path, declared: bool) -> None:
    path = daily / "day=2030-06-07" / "part-0.parquet"
    table = _day_table(6)
    table = table.set_column(2, "price", pc.cast(table.column("price"), pa.string()))
    pq.write_table(table, path)
    source = ParquetSource(daily, time_column="ts",
                           schema={"price": "number"} if declared else None)
    with pytest.raises(DataValidationError, match="'price' has type string") as raised:
        source.scan(["ts", "price"])
    assert raised.value.context["file"] == str(path)


def test_a_harmless_width_change_passes_a_declared_coarse_type(daily: Path) -> None:
    path = daily / "day=2030-06-07" / "part-0.parquet"
    table = _day_table(6)
    table = table.set_column(2, "price", pc.cast(table.column("price"), pa.float32()))
    pq.write_table(table, path)
    source = ParquetSource(daily, time_column="ts", schema={"price": "float"})
    assert source.check().files == 10


def test_a_late_file_is_picked_up_once_in_incremental_mode(daily: Path,
                                                           tmp_path: Path) -> None:
    store = HistoryStore(f"sqlite:///{tmp_path / 'history.sqlite'}")
    store.upgrade()
    source = ParquetSource(daily, time_column="ts")
    monitor = "incremental sales"

    def nightly(slot_day: int) -> int:
        scan = source.scan(["ts", "units sold"], seen_files=store.seen_files(monitor))
        rows = sum(batch.num_rows for batch in scan)
        claim = store.claim_slot(monitor, _at(slot_day), "t")
        assert claim is not None
        store.complete_run(claim, RunRecord(rows_read=rows, watermark_at=scan.max_time),
                           files=scan.file_entries)
        return rows

    assert nightly(10) == 480
    assert nightly(11) == 0
    late = daily / "day=2030-06-03" / "part-late.parquet"  # rows of an old day, arriving late
    pq.write_table(_day_table(2, 6, shift_hours=0.1), late)
    assert nightly(12) == 6
    assert nightly(13) == 0
    assert store.runs(monitor)["rows_read"].tolist() == [480, 0, 6, 0]
    assert store.seen_files(monitor)[str(late)].rows == 6

    pq.write_table(_day_table(2, 7), late)  # rewritten after it was counted
    os.utime(late, ns=(1, 1))
    with pytest.raises(SourceError, match="count its rows twice"):
        source.scan(["ts"], seen_files=store.seen_files(monitor))
    store.close()


def test_bad_arguments_are_refused_with_the_reason(daily: Path) -> None:
    source = ParquetSource(daily, time_column="ts")
    with pytest.raises(ConfigurationError, match="must be a datetime"):
        source.scan(["ts"], "2030-06-01")  # type: ignore[arg-type]
    with pytest.raises(ConfigurationError, match="not before its end"):
        source.scan(["ts"], _at(3), _at(3))
    with pytest.raises(DataValidationError, match="'revenue' is missing"):
        source.scan(["ts", "revenue"])
    with pytest.raises(DataValidationError, match="time column 'when'"):
        ParquetSource(daily, time_column="when").scan(["price"])
    with pytest.raises(SourceError, match="does not exist"):
        ParquetSource(daily / "nope", time_column="ts").scan(["ts"])
    with pytest.raises(ConfigurationError, match="unknown type 'money'"):
        ParquetSource(daily, time_column="ts", schema={"price": "money"}).check()


def test_check_and_max_time_read_only_metadata(daily: Path) -> None:
    source = ParquetSource(daily, time_column="ts")
    summary = source.check()
    assert (summary.files, summary.rows) == (10, 480)
    assert summary.min_time == _at(0)
    assert source.max_time() == _at(9, 23) + dt.timedelta(minutes=30)


def test_rows_without_a_time_are_never_delivered(tmp_path: Path) -> None:
    table = _day_table(0, 10)
    times = table.column("ts").to_pylist()
    times[3] = times[7] = None
    path = tmp_path / "gaps.parquet"
    pq.write_table(table.set_column(0, "ts", pa.array(times, pa.timestamp("us"))), path)
    source = ParquetSource(path, time_column="ts")
    assert _rows(source.scan(["units sold"])).column(0).to_pylist() == [
        0.0, 1.0, 2.0, 4.0, 5.0, 6.0, 8.0, 9.0]
    assert _rows(source.scan(["units sold"], _at(0, 1))).num_rows == 6
