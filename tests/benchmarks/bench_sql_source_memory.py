"""Peak memory of the SQL source streaming a PostgreSQL table: flat in the row count.

Run on demand (not collected by pytest)::

    REGWARDEN_TEST_POSTGRES_URL=postgresql+psycopg://postgres@127.0.0.1:5432/test \
        python3 tests/benchmarks/bench_sql_source_memory.py [--rows 5000000]

It fills a table once (5 million rows: time, two floats, an integer), then
measures, each in a fresh process, the peak resident set size (``ru_maxrss``)
of: importing the libraries only (the floor), streaming the first 1 million
rows by time window, and streaming all 5 million.  Flat memory means the 1M
and 5M peaks are close to each other; a reader that kept the rows would grow
by roughly 5x the per-row cost.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

PROJECT_ROOT = Path(__file__).resolve().parents[2]
TABLE = "regwarden_bench_stream"
START = dt.datetime(2020, 1, 1, tzinfo=dt.UTC)


def _fill(url: str, rows: int) -> None:
    import sqlalchemy as sa

    engine = sa.create_engine(url)
    with engine.begin() as connection:
        exists = connection.execute(sa.text("SELECT to_regclass(:name)"),
                                    {"name": TABLE}).scalar()
        if exists:
            count = connection.execute(sa.text(f"SELECT count(*) FROM {TABLE}")).scalar()
            if count == rows:
                return
            connection.execute(sa.text(f"DROP TABLE {TABLE}"))
        connection.execute(sa.text(
            f"CREATE TABLE {TABLE} (ts timestamp NOT NULL, price double precision, "
            "units double precision, store integer)"))
        # generated on the server: no client memory is spent on the fill
        connection.execute(sa.text(
            f"INSERT INTO {TABLE} SELECT timestamp '2020-01-01' + i * interval '1 second', "
            "random() * 10, random() * 100, (i % 50)::int FROM generate_series(0, :n - 1) i"),
            {"n": rows})
        connection.execute(sa.text(f"CREATE INDEX ON {TABLE} (ts)"))
        connection.execute(sa.text(f"ANALYZE {TABLE}"))
    engine.dispose()


def _measure(url: str, rows: int | None) -> dict[str, float]:
    """Runs in the child: stream ``rows`` rows (None: import only), report peak RSS."""
    sys.path.insert(0, str(PROJECT_ROOT))
    from storage.sources import SqlSource

    began = time.perf_counter()
    delivered = 0
    if rows is not None:
        source = SqlSource(url, table=TABLE, time_column="ts", batch_rows=50_000)
        scan = source.scan(["ts", "price", "units", "store"], START,
                           START + dt.timedelta(seconds=rows))
        for batch in scan:
            delivered += batch.num_rows
        source.close()
    peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return {"rows": delivered, "peak_mib": peak_kib / 1024,
            "seconds": time.perf_counter() - began}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=5_000_000)
    parser.add_argument("--keep", action="store_true",
                        help="keep the filled table for the next run (default: drop it)")
    parser.add_argument("--child", type=str, default=None, help=argparse.SUPPRESS)
    arguments = parser.parse_args()
    url = os.environ.get("REGWARDEN_TEST_POSTGRES_URL")
    if not url:
        sys.exit("set REGWARDEN_TEST_POSTGRES_URL to a PostgreSQL database for the benchmark")
    if arguments.child is not None:
        rows = None if arguments.child == "none" else int(arguments.child)
        print(json.dumps(_measure(url, rows)))
        return
    print(f"filling {TABLE} with {arguments.rows:,} rows (once) ...", flush=True)
    _fill(url, arguments.rows)
    results = {}
    for label, rows in (("imports only", "none"), ("1M rows", "1000000"),
                        (f"{arguments.rows / 1e6:g}M rows", str(arguments.rows))):
        output = subprocess.run([sys.executable, __file__, "--child", rows], check=True,
                                capture_output=True, text=True).stdout
        results[label] = json.loads(output)
        result = results[label]
        print(f"{label:>14}: peak RSS {result['peak_mib']:7.1f} MiB, {result['rows']:>9,} rows "
              f"in {result['seconds']:6.1f} s")
    floor = results["imports only"]["peak_mib"]
    one, five = list(results.values())[1:]
    print(f"growth over imports: 1M {one['peak_mib'] - floor:.1f} MiB, "
          f"{arguments.rows / 1e6:g}M {five['peak_mib'] - floor:.1f} MiB; "
          f"ratio of peaks {five['peak_mib'] / one['peak_mib']:.3f} (1.0 = flat)")
    if not arguments.keep:
        import sqlalchemy as sa

        engine = sa.create_engine(url)
        with engine.begin() as connection:
            connection.execute(sa.text(f"DROP TABLE IF EXISTS {TABLE}"))
        engine.dispose()


if __name__ == "__main__":
    main()
