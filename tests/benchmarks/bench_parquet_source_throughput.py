"""Throughput of the Parquet source against a bare pyarrow scan of the same columns.

Run on demand (not collected by pytest)::

    python3 tests/benchmarks/bench_parquet_source_throughput.py [--files 8] [--rows 1000000]

Writes a Hive-partitioned dataset (one file per day, row groups of 128k rows,
a timestamp and five float columns) to a temporary folder, warms the page
cache, then alternates the two readers ``--repeats`` times in this one
process, each reading the same three columns of the whole dataset:

- bare: ``pyarrow.dataset.dataset(root).to_batches(columns=...)`` (threaded);
- ours: ``ParquetSource(root).scan(columns)`` iterated to the end (schema
  checks, per-file reading, time-order check, UTC time column).

Prints the median rows per second of each and their ratio (target: ours at
least 80 % of bare).
"""

from __future__ import annotations

import argparse
import datetime as dt
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq

PROJECT_ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(PROJECT_ROOT))

from storage.sources import ParquetSource  # noqa: E402

COLUMNS = ["ts", "price", "units"]


def _write(root: Path, files: int, rows: int) -> None:
    rng = np.random.default_rng(7)
    start = np.datetime64("2030-01-01T00:00:00", "us")
    step = np.timedelta64(86_400_000_000 // rows, "us")
    for day in range(files):
        times = start + np.timedelta64(day, "D") + np.arange(rows) * step
        table = pa.table({"ts": pa.array(times, pa.timestamp("us")),
                          **{name: rng.normal(size=rows) for name in
                             ("price", "units", "discount", "temperature", "footfall")}})
        folder = root / f"day={(dt.date(2030, 1, 1) + dt.timedelta(days=day)).isoformat()}"
        folder.mkdir(parents=True)
        pq.write_table(table, folder / "part-0.parquet", row_group_size=128 * 1024)


def _bare(root: Path, batch_rows: int) -> int:
    dataset = ds.dataset(root, format="parquet", partitioning="hive")
    return sum(batch.num_rows for batch in dataset.to_batches(columns=COLUMNS,
                                                              batch_size=batch_rows))


def _ours(root: Path, batch_rows: int) -> int:
    source = ParquetSource(root, time_column="ts", batch_rows=batch_rows,
                           schema={"ts": "timestamp", "price": "float", "units": "float"})
    return sum(batch.num_rows for batch in source.scan(COLUMNS))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=8)
    parser.add_argument("--rows", type=int, default=1_000_000, help="rows per file")
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--batch-rows", type=int, default=65_536)
    arguments = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="regwarden-bench-") as folder:
        root = Path(folder) / "sales"
        _write(root, arguments.files, arguments.rows)
        expected = arguments.files * arguments.rows
        readers = {"bare pyarrow": _bare, "ParquetSource": _ours}
        for reader in readers.values():  # warm the page cache and both code paths
            assert reader(root, arguments.batch_rows) == expected
        rates: dict[str, list[float]] = {name: [] for name in readers}
        for _ in range(arguments.repeats):
            for name, reader in readers.items():
                began = time.perf_counter()
                rows = reader(root, arguments.batch_rows)
                rates[name].append(rows / (time.perf_counter() - began))
                assert rows == expected
        print(f"{arguments.files} files x {arguments.rows:,} rows, columns {COLUMNS}, "
              f"batch_rows {arguments.batch_rows}, {arguments.repeats} alternating repeats")
        medians = {name: statistics.median(values) for name, values in rates.items()}
        for name, value in medians.items():
            print(f"{name:>14}: median {value / 1e6:7.2f} M rows/s "
                  f"(min {min(rates[name]) / 1e6:.2f}, max {max(rates[name]) / 1e6:.2f})")
        ratio = medians["ParquetSource"] / medians["bare pyarrow"]
        print(f"ratio ParquetSource / bare: {ratio:.3f} (target >= 0.80)")


if __name__ == "__main__":
    main()
