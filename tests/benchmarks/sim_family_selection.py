"""Longer run of the model-choice simulation in ``tests/test_family_selection_simulation.py``.

Run on demand (not collected by pytest)::

    python tests/benchmarks/sim_family_selection.py                 # 2000 replications per n
    python tests/benchmarks/sim_family_selection.py --replications 500 --sizes 50 200

Truth ``y = 1 + 0.5·x1 + 0.3·x2 + e`` (seeded, invented); candidates ``under`` (x1), ``true``
(x1 + x2), ``over`` (x1 + x2 + x3).  Prints how often AIC and BIC pick each candidate, with the
exact finite-n probability that ``over`` beats ``true`` (F(1, n − 4) tail; see the test's
docstring) and BIC's consistency (Schwarz 1978).
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from test_family_selection_simulation import choices, exact_over_fit  # noqa: E402


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replications", type=int, default=2000)
    parser.add_argument("--sizes", type=int, nargs="*", default=[50, 100, 200, 1000, 5000])
    parser.add_argument("--seed", type=int, default=1978)
    options = parser.parse_args()
    rng = np.random.default_rng(options.seed)
    print(f"{options.replications} replications per n, seed {options.seed}")
    print(f"{'n':>6}  {'BIC→under':>9} {'BIC→true':>9} {'BIC→over':>9} {'exact':>7}   "
          f"{'AIC→under':>9} {'AIC→true':>9} {'AIC→over':>9} {'exact':>7}")
    for n in options.sizes:
        rates = choices(n, options.replications, rng)
        bic, aic = rates["bic"], rates["aic"]
        print(f"{n:>6}  {bic['under']:>9.4f} {bic['true']:>9.4f} {bic['over']:>9.4f} "
              f"{exact_over_fit(n, math.log(n)):>7.4f}   {aic['under']:>9.4f} {aic['true']:>9.4f} "
              f"{aic['over']:>9.4f} {exact_over_fit(n, 2.0):>7.4f}")
    print("exact: P(over beats true) from F(1, n-4); AIC's limit P(chi2_1 > 2) = "
          f"{math.erfc(1.0):.4f}")


if __name__ == "__main__":
    main()
