"""Benchmark: every check for 6 candidates on millions of rows from Parquet.

Run on demand (not collected by pytest)::

    python tests/benchmarks/bench_checks.py                         # 5M rows, all sides
    python tests/benchmarks/bench_checks.py --rows 20000000 --sides regwarden floor
    python tests/benchmarks/bench_checks.py --rows 1000000 --repeats 3

Sides, each in its own process (peak RSS of that process alone, via ``os.wait4``):

* **regwarden**: pass 1 (the union least-squares state) and pass 2 (every check's
  sums for the 6 models at once, with one refinement step) over the Parquet file
  in chunks of 65,536 rows, then ``run_checks`` for each model: 16 single-window
  checks per model, the order-dependent ones in time order;
* **regwarden-norefine**: the same without the refinement sums in pass 2;
* **floor**: a bare ``pyarrow`` read of the columns, one chunked QR pass (the
  engine's state) and one residual pass for all models (``Z @ B``, sums of squares):
  the least any two-pass tool must do;
* **statsmodels**: ``pandas.read_parquet`` into memory, then per model ``OLS.fit``
  and the same checks: ``jarque_bera``, ``omni_normtest``, ``scipy.stats.shapiro`` and
  ``anderson`` on a 5,000-row sample, ``het_breuschpagan`` (both forms), ``het_white``,
  ``durbin_watson``, ``acorr_breusch_godfrey(nlags=10)``, Ljung–Box from ``acf(fft=True)``
  (``acorr_ljungbox`` in 0.15 uses ``acf(fft=False)``, O(n²): hours at 5M rows),
  ``linear_reset(use_f=True)``, ``variance_inflation_factor`` per term, the BKW
  condition number, ``OLSInfluence`` (leverage, Cook's distance, internal studentized
  residuals; the external ones and the Bonferroni test by their closed form, because
  ``resid_studentized_external`` / ``outlier_test`` are O(n²) in 0.15) and
  ``breaks_cusumolsresid``.

Targets (issue 4): regwarden at least 20x faster than statsmodels, within 3x of the
floor, peak memory under 1 GB at 20 million rows and flat in rows.  The data are
synthetic (seeded, invented for this benchmark), written under /tmp; nothing here is
committed.  The machines are shared and noisy: medians of ``--repeats`` runs.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

COLUMNS = ["y", "x1", "x2", "x3", "x4", "x5", "t"]
CANDIDATES = [
    "y ~ x1 + x2",
    "y ~ x1 + x2 + x3",
    "y ~ x1 + x2 + x3 + x4",
    "y ~ x1 + x2 + x3 + x4 + x5",
    "y ~ x1 * x2 + x3",
    "y ~ x1 * x2 + x3 + x4 + x5",
]
CHUNK_ROWS = 65_536


def write_data(path: Path, rows: int, seed: int = 4) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    writer = None
    block = 1_000_000
    for start in range(0, rows, block):
        m = min(block, rows - start)
        x = rng.normal(size=(m, 5))
        y = 2 + x @ np.array([1.0, -0.5, 0.3, 0.2, 0.0]) + 0.2 * x[:, 0] * x[:, 1] + \
            rng.normal(size=m) * (1 + 0.1 * np.abs(x[:, 2]))
        table = pa.table({"y": y, **{f"x{j + 1}": x[:, j] for j in range(5)},
                          "t": np.arange(start, start + m, dtype=np.int64)})
        if writer is None:
            writer = pq.ParquetWriter(path, table.schema)
        writer.write_table(table, row_group_size=CHUNK_ROWS * 4)
    assert writer is not None
    writer.close()


def side_regwarden(path: str, refine: bool) -> dict:  # type: ignore[type-arg]
    from monitor._frames import chunk_source
    from monitor.stats.checks import run_checks
    from monitor.stats.fitting import derive_factor, pass_one
    from monitor.stats.residual_pass import CheckOptions, residual_pass

    started = time.perf_counter()
    source = chunk_source(path, COLUMNS, CHUNK_ROWS)
    one = pass_one(source(), CANDIDATES)
    factors = [derive_factor(one, m) for m in range(len(CANDIDATES))]
    two = residual_pass(source(), one.design, one.state, factors, time_column="t",
                        options=CheckOptions(refine=refine))
    checks = [run_checks(two, m) for m in range(len(CANDIDATES))]
    elapsed = time.perf_counter() - started
    applicable = sum(c.applicable for model in checks for c in model)
    return {"seconds": elapsed, "rows": two.n, "checks": applicable,
            "white_0": checks[0][6].statistic}


def side_floor(path: str) -> dict:  # type: ignore[type-arg]
    import pyarrow.parquet as pq

    from monitor.stats.engine import LeastSquaresState

    started = time.perf_counter()
    names = ["x1", "x2", "x3", "x4", "x5"]

    def batches():  # type: ignore[no-untyped-def]
        for batch in pq.ParquetFile(path).iter_batches(batch_size=CHUNK_ROWS,
                                                       columns=[*names, "y", "x1"]):
            X = np.column_stack([batch.column(n).to_numpy() for n in names])
            X = np.column_stack([X, X[:, 0] * X[:, 1]])
            yield X, batch.column("y").to_numpy()
    state = LeastSquaresState(6)
    for X, y in batches():
        state.absorb(X, y)
    models = [(0, 1), (0, 1, 2), (0, 1, 2, 3), (0, 1, 2, 3, 4), (0, 1, 5, 2),
              (0, 1, 5, 2, 3, 4)]
    B = np.zeros((7, len(models)))
    for m, columns in enumerate(models):
        factor = state.subset(columns, True)
        B[0, m] = factor.coefficients[0]
        B[[1 + c for c in columns], m] = factor.coefficients[1:]
    ssr = np.zeros(len(models))
    for X, y in batches():
        E = y[:, None] - B[0] - X @ B[1:]
        ssr += np.einsum("ij,ij->j", E, E)
    return {"seconds": time.perf_counter() - started, "rows": state.n, "ssr_0": float(ssr[0])}


def side_statsmodels(path: str) -> dict:  # type: ignore[type-arg]
    import warnings

    import pandas as pd
    import statsmodels.api as sm
    from scipy import stats
    from statsmodels.stats import diagnostic, stattools
    from statsmodels.stats.outliers_influence import OLSInfluence, variance_inflation_factor
    from statsmodels.tsa.stattools import acf

    started = time.perf_counter()
    frame = pd.read_parquet(path, columns=COLUMNS)
    frame["x1x2"] = frame.x1 * frame.x2
    designs = [["x1", "x2"], ["x1", "x2", "x3"], ["x1", "x2", "x3", "x4"],
               ["x1", "x2", "x3", "x4", "x5"], ["x1", "x2", "x1x2", "x3"],
               ["x1", "x2", "x1x2", "x3", "x4", "x5"]]
    rng = np.random.default_rng(1)
    white = None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for columns in designs:
            X = sm.add_constant(frame[columns].to_numpy())
            fit = sm.OLS(frame.y.to_numpy(), X).fit()
            e = fit.resid
            stattools.jarque_bera(e)
            stattools.omni_normtest(e)
            sample = rng.choice(e, 5000, replace=False)
            stats.shapiro(sample)
            stats.anderson(sample, dist="norm", method="interpolate")
            diagnostic.het_breuschpagan(e, X, robust=False)
            diagnostic.het_breuschpagan(e, X)
            lm = diagnostic.het_white(e, X)[0]
            white = lm if white is None else white
            stattools.durbin_watson(e)
            diagnostic.acorr_breusch_godfrey(fit, nlags=10, result_object=True)
            # acorr_ljungbox (0.15) calls acf(fft=False), which is O(n²) (hours at 5M rows);
            # the same Q from statsmodels' acf with fft=True
            r = acf(e, nlags=10, fft=True)[1:]
            n_rows = len(e)
            _ = n_rows * (n_rows + 2) * np.sum(r**2 / (n_rows - np.arange(1, 11)))
            diagnostic.linear_reset(fit, power=3, use_f=True)
            [variance_inflation_factor(X, j) for j in range(1, X.shape[1])]
            np.linalg.cond(X / np.linalg.norm(X, axis=0))
            # OLSInfluence.resid_studentized_external (hence dffits and outlier_test) is
            # O(n²) in statsmodels 0.15 (48 s at 5,000 rows): the closed form from its
            # internal studentized residuals instead, and the Bonferroni test by scipy
            influence = OLSInfluence(fit)
            h = influence.hat_matrix_diag
            internal = influence.resid_studentized_internal
            _ = influence.cooks_distance
            df_ext = fit.df_resid - 1
            external = internal * np.sqrt(df_ext / (fit.df_resid - internal**2))
            _ = np.minimum(1, 2 * len(e) * stats.t.sf(np.abs(external), df_ext)), h
            diagnostic.breaks_cusumolsresid(e, ddof=X.shape[1])
    return {"seconds": time.perf_counter() - started, "rows": len(frame), "white_0": white}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=5_000_000)
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--sides", nargs="+",
                        default=["regwarden", "regwarden-norefine", "floor", "statsmodels"])
    parser.add_argument("--side", help=argparse.SUPPRESS)
    parser.add_argument("--path", help=argparse.SUPPRESS)
    options = parser.parse_args()
    if options.side:
        result = {"regwarden": lambda: side_regwarden(options.path, True),
                  "regwarden-norefine": lambda: side_regwarden(options.path, False),
                  "floor": lambda: side_floor(options.path),
                  "statsmodels": lambda: side_statsmodels(options.path)}[options.side]()
        from _peak import report_side

        report_side(result)
        return
    from _peak import run_side

    path = Path(f"/tmp/regwarden_bench_checks_{options.rows}.parquet")
    if not path.exists():
        print(f"writing {options.rows:,} rows to {path} ...", file=sys.stderr)
        write_data(path, options.rows)
    measured: dict[str, list] = {}  # type: ignore[type-arg]
    for _ in range(options.repeats):
        for side in options.sides:
            data, _ = run_side(__file__, side, path)
            measured.setdefault(side, []).append((data["seconds"], data["peak_rss_mb"], data))
            print(f"  {side:20s} {data['seconds']:8.2f} s  peak {data['peak_rss_mb']:8.0f} MB  "
                  f"{data}", file=sys.stderr)
    print(f"\n{options.rows:,} rows, {len(CANDIDATES)} candidates, medians of "
          f"{options.repeats} run(s)")
    print(f"  {'side':20s} {'seconds':>9s} {'peak MB':>9s}")
    medians = {}
    for side, runs in measured.items():
        seconds = statistics.median(r[0] for r in runs)
        peak = statistics.median(r[1] for r in runs)
        medians[side] = seconds
        print(f"  {side:20s} {seconds:9.2f} {peak:9.0f}")
    if "regwarden" in medians:
        if "statsmodels" in medians:
            ratio = medians["statsmodels"] / medians["regwarden"]
            print(f"  statsmodels / regwarden: {ratio:.1f}x (target >= 20x)")
        if "floor" in medians:
            print(f"  regwarden / floor:       {medians['regwarden'] / medians['floor']:.2f}x "
                  "(target <= 3x)")
        if "regwarden-norefine" in medians and "floor" in medians:
            print(f"  regwarden-norefine / floor: "
                  f"{medians['regwarden-norefine'] / medians['floor']:.2f}x")


if __name__ == "__main__":
    main()
