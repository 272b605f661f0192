"""What one night's checks saw, read back from the ``detail`` JSON of its check rows.

The nightly run stores each check's supporting data in the check row's
``detail``.  The report draws the keys below when they are present and says
plainly which are missing; it never recomputes them.

================================  =============================================================
check row (``check_name``)        ``detail`` keys read
================================  =============================================================
any check (first one found)       ``sample``: ``{"at": [...], "key": [...], "fitted": [...],
                                  "residual": [...]}`` (the bounded residual sample of the
                                  window, in time order)
any drift check (first found)     ``forecast_errors``: ``{"at": [...], "key": [...],
                                  "error": [...]}`` (the frozen baseline model's errors on the
                                  fresh rows)
``psi``                           ``bins``: ``{"edges": [...], "baseline_share": [...],
                                  "fresh_share": [...]}``
``cooks_distance``                ``top_rows``: ``[{"key": ..., "cooks_distance": ...}, ...]``
                                  and ``cutoffs``: ``{label: value}``
``cusum``                         ``path`` (scaled running sum), ``path_at`` (instants, optional),
                                  ``bound`` (±, constant) or ``lower``/``upper`` (arrays),
                                  ``change_index`` / ``change_at`` (the estimated change)
================================  =============================================================
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import pandas as pd

from ._views import plain_value

__all__ = ["CusumTrace", "NightEvidence", "night_evidence"]


@dataclass(frozen=True, slots=True)
class CusumTrace:
    """The running-sum path a ``cusum`` check stored, with its bounds and change estimate."""

    path: tuple[float, ...]
    at: tuple[str, ...] | None
    bound: float | None
    lower: tuple[float, ...] | None
    upper: tuple[float, ...] | None
    change_index: int | None
    change_at: str | None
    statistic: float | None
    p_value: float | None
    verdict: str


@dataclass(frozen=True, slots=True)
class NightEvidence:
    """The arrays one night's checks kept for one model and segment (``None`` when absent)."""

    run_id: int
    night: dt.datetime
    segment: str
    model: str
    sample: Mapping[str, Sequence[Any]] | None
    forecast_errors: Mapping[str, Sequence[Any]] | None
    bins: Mapping[str, Sequence[float]] | None
    top_rows: tuple[Mapping[str, Any], ...]
    cutoffs: Mapping[str, float]
    cusum: CusumTrace | None

    def missing(self) -> list[str]:
        """Names of the views this night cannot show, for the report to say so."""
        absent = []
        if self.sample is None:
            absent.append("residual sample (errors over time and against predictions)")
        if self.bins is None:
            absent.append("baseline bins (psi check)")
        if not self.top_rows:
            absent.append("most influential rows (cooks_distance check)")
        if self.cusum is None:
            absent.append("running-sum path (cusum check)")
        return absent


def _sequence(value: Any) -> bool:
    return isinstance(value, (list, tuple))


def _sample(detail: Mapping[str, Any], name: str, values: str) -> Mapping[str, Any] | None:
    sample = detail.get(name)
    if isinstance(sample, Mapping) and _sequence(sample.get(values)) and sample[values]:
        return {key: list(column) for key, column in sample.items() if _sequence(column)}
    return None


def _cusum(row: Any) -> CusumTrace | None:
    detail = row.detail if isinstance(row.detail, Mapping) else {}
    path = detail.get("path")
    if not _sequence(path) or not path:
        return None
    at = detail.get("path_at")
    lower, upper = detail.get("lower"), detail.get("upper")
    index = detail.get("change_index")
    return CusumTrace(
        path=tuple(float("nan") if v is None else float(v) for v in path),
        at=tuple(str(v) for v in at) if _sequence(at) and len(at) == len(path) else None,
        bound=float(detail["bound"]) if detail.get("bound") is not None else None,
        lower=tuple(float(v) for v in lower) if _sequence(lower) else None,
        upper=tuple(float(v) for v in upper) if _sequence(upper) else None,
        change_index=int(index) if index is not None else None,
        change_at=str(detail["change_at"]) if detail.get("change_at") else None,
        statistic=plain_value(row.statistic), p_value=plain_value(row.p_value),
        verdict=str(row.verdict))


def night_evidence(checks: pd.DataFrame, *, model: str, segment: str) -> NightEvidence | None:
    """The evidence of the LATEST night in ``checks`` for one model and segment.

    ``checks`` holds rows of ``HistoryStore.check_trend(..., with_detail=True)``;
    None when that model has no check rows.
    """
    rows = checks[(checks["model"] == model) & (checks["segment"] == segment)]
    if not len(rows):
        return None
    latest = rows[rows["run_id"] == rows["run_id"].iloc[-1]]
    sample = forecast = bins = cusum = None
    top_rows: tuple[Mapping[str, Any], ...] = ()
    cutoffs: dict[str, float] = {}
    for row in latest.itertuples(index=False):
        detail = row.detail if isinstance(row.detail, Mapping) else {}
        sample = sample or _sample(detail, "sample", "residual")
        forecast = forecast or _sample(detail, "forecast_errors", "error")
        if row.check_name == "psi":
            found = detail.get("bins")
            if isinstance(found, Mapping) and all(_sequence(found.get(k)) for k in
                                                  ("edges", "baseline_share", "fresh_share")):
                bins = {k: [float(v) for v in found[k]]
                        for k in ("edges", "baseline_share", "fresh_share")}
        elif row.check_name == "cooks_distance":
            found_rows = detail.get("top_rows")
            if _sequence(found_rows):
                top_rows = tuple(r for r in found_rows if isinstance(r, Mapping)
                                 and r.get("cooks_distance") is not None)
            found_cutoffs = detail.get("cutoffs")
            if isinstance(found_cutoffs, Mapping):
                cutoffs = {str(k): float(v) for k, v in found_cutoffs.items() if v is not None}
        elif row.check_name == "cusum":
            cusum = _cusum(row)
    first = latest.iloc[0]
    return NightEvidence(run_id=int(first["run_id"]), night=plain_value(first["slot_at"]),
                         segment=segment, model=model, sample=sample, forecast_errors=forecast,
                         bins=bins, top_rows=top_rows, cutoffs=cutoffs, cusum=cusum)
