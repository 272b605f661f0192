"""Reader for the NIST StRD linear-regression files (format: their README in shared/reference).

The files stay outside the project; tests read them from ``../shared/reference/nist_strd``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[EeDd][-+]?\d+)?|Infinity"


@dataclass(frozen=True)
class NistCase:
    name: str
    y: np.ndarray
    x: np.ndarray  # (n, k) raw predictor columns as in the file
    formula: str
    coefficients: np.ndarray
    std_errors: np.ndarray
    residual_sd: float
    r_squared: float
    ss_model: float
    ss_resid: float
    df_model: int
    df_resid: int
    f_statistic: float


def _number(text: str) -> float:
    return float("inf") if text == "Infinity" else float(text.replace("D", "E").replace("d", "e"))


def _numbers(line: str) -> list[float]:
    return [_number(t) for t in re.findall(NUMBER, line)]


FORMULAS = {
    "Norris": "y ~ x",
    "Pontius": "y ~ x + I(x**2)",
    "NoInt1": "y ~ x - 1",
    "NoInt2": "y ~ x - 1",
    "Filip": "y ~ " + " + ".join(["x"] + [f"I(x**{k})" for k in range(2, 11)]),
    "Longley": "y ~ x1 + x2 + x3 + x4 + x5 + x6",
    **{f"Wampler{i}": "y ~ " + " + ".join(["x"] + [f"I(x**{k})" for k in range(2, 6)])
       for i in range(1, 6)},
}


def read_case(directory: Path, name: str) -> NistCase:
    lines = (directory / f"{name}.dat").read_text().splitlines()
    text = "\n".join(lines)
    data_start = int(re.search(r"Data\s+\(lines\s+(\d+)\s+to\s+(\d+)\)", text).group(1))
    data_end = int(re.search(r"Data\s+\(lines\s+(\d+)\s+to\s+(\d+)\)", text).group(2))
    rows = np.array([_numbers(line) for line in lines[data_start - 1 : data_end]])
    y, x = rows[:, 0], rows[:, 1:]
    coefficients, errors = [], []
    residual_sd = r_squared = None
    for line in lines[30:58]:
        stripped = line.strip()
        if re.match(r"^B\d+\s", stripped):
            values = _numbers(stripped.split(None, 1)[1])
            coefficients.append(values[0])
            errors.append(values[1])
        elif stripped.startswith(("Residual Standard Deviation", "Standard Deviation")):
            residual_sd = _numbers(stripped)[-1]
        elif stripped.startswith("R-Squared"):
            r_squared = _numbers(stripped)[-1]
        elif stripped.startswith("Regression"):
            regression = _numbers(stripped)
        elif stripped.startswith("Residual") and len(_numbers(stripped)) >= 3:
            residual = _numbers(stripped)
    return NistCase(name, y, x, FORMULAS[name], np.array(coefficients), np.array(errors),
                    residual_sd, r_squared, regression[1], residual[1], int(regression[0]),
                    int(residual[0]), regression[3])


def frame_of(case: NistCase) -> dict[str, np.ndarray]:
    if case.x.shape[1] == 1:
        return {"y": case.y, "x": case.x[:, 0]}
    return {"y": case.y, **{f"x{i + 1}": case.x[:, i] for i in range(case.x.shape[1])}}


def lre(computed: float | np.ndarray, certified: float | np.ndarray) -> np.ndarray:
    """Log relative error (McCullough 1998); absolute error where the certified value is 0.

    Capped at 15 (the certified values carry 15 significant digits)."""
    computed = np.atleast_1d(np.asarray(computed, dtype=float))
    certified = np.atleast_1d(np.asarray(certified, dtype=float))
    with np.errstate(divide="ignore"):
        error = np.where(certified == 0, np.abs(computed),
                         np.abs(computed - certified) / np.abs(np.where(certified == 0, 1, certified)))
        return np.minimum(15.0, np.where(error == 0, 15.0, -np.log10(error)))
