"""A family whose rows come sorted by a categorical column still knows every level.

Seeded generated test data (a simulated linear process), not a reference value: the
check is structural (levels, row counts), and the fit is compared with a direct fit.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

import monitor


def test_levels_missing_from_the_first_chunk_are_levels_not_unseen_values() -> None:
    rng = np.random.default_rng(7)
    frame = pd.DataFrame({"x": rng.normal(size=400), "g": np.repeat(list("abcd"), 100)})
    frame["y"] = frame["x"] + 2.0 * (frame["g"] == "d") + rng.normal(size=400)
    family = monitor.Family(response="y", candidates={"small": "y ~ x", "large": "y ~ x + g"},
                            chosen="large")
    report = family.evaluate(frame, chunk_rows=50)  # the first chunk holds level 'a' only
    assert report.rows.unseen_levels == {} and report.rows.dropped_rows == 0
    assert report.fits["large"].terms == ("Intercept", "x", "g[b]", "g[c]", "g[d]")
    direct = monitor.fit(frame, "y ~ x + g")
    for ours, theirs in zip(report.fits["large"].coefficients, direct.coefficients,
                            strict=True):
        assert abs(ours.estimate - theirs.estimate) <= 1e-10 * max(1.0, abs(theirs.estimate))
