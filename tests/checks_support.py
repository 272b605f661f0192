"""Helpers for the check tests: run pass 1 and pass 2 on a frame with a given chunking."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from monitor.stats.checks import run_checks
from monitor.stats.fitting import derive_factor, pass_one
from monitor.stats.residual_pass import CheckOptions, PassTwoResult, residual_pass


def frame_chunks(frame: pd.DataFrame, rows: int):  # type: ignore[no-untyped-def]
    """A chunk source over a frame, ``rows`` rows per chunk (text columns as objects)."""
    def source():  # type: ignore[no-untyped-def]
        for start in range(0, len(frame), rows):
            part = frame.iloc[start:start + rows]
            chunk = {}
            for name in part.columns:
                values = part[name]
                if values.dtype == object or isinstance(values.dtype, pd.StringDtype):
                    chunk[name] = values.astype(object).to_numpy()
                elif np.issubdtype(values.dtype, np.datetime64):
                    chunk[name] = values.to_numpy()
                else:
                    chunk[name] = values.to_numpy(dtype=float)
            yield chunk
    return source


def run_family(frame: pd.DataFrame, formulas: Sequence[str], *, rows: int | None = None,
               time_column: str | None = None, key_column: str | None = None,
               options: CheckOptions | None = None, baseline=None, break_value=None,
               in_time_order: bool = True, categorical=None
               ) -> PassTwoResult:  # type: ignore[no-untyped-def]
    """Pass 1 and pass 2 over ``frame`` in chunks of ``rows`` rows."""
    source = frame_chunks(frame, rows or len(frame))
    one = pass_one(source(), list(formulas), categorical=categorical)
    factors = [derive_factor(one, m) for m in range(len(formulas))]
    return residual_pass(source(), one.design, one.state, factors, time_column=time_column,
                         key_column=key_column, options=options or CheckOptions(),
                         baseline=baseline, break_value=break_value, in_time_order=in_time_order)


def checks_by_id(result: PassTwoResult, model: int = 0) -> dict:  # type: ignore[type-arg]
    return {c.check: c for c in run_checks(result, model)}


def relative(a: float, b: float) -> float:
    """Relative difference, with an absolute floor for values near zero."""
    return abs(a - b) / max(abs(b), 1e-300)
