"""What one night's checks saw, read back from the ``detail`` JSON of its check rows.

The nightly run stores each check's supporting data in the check row's
``detail``.  The report draws the keys below when they are present and says
plainly which are missing; it never recomputes them.

``cusum``
    ``change``: the change-point estimate of ``monitor.stats.changepoint``
    (``row``, ``key``, ``path_rows``, ``path_values`` = the thinned running sum
    ``S_k`` of the residuals, ``path_keys``); ``critical_values["5%"]``;
    ``largest_at_row``.  The check's statistic is ``max|S_k| / √(n·σ̂²)``; when
    the thinned path holds the row of that maximum, the path is drawn on the
    statistic's scale (``S_k`` divided by ``|S_max| / statistic``, which undoes
    the stored division) against ``±critical_values["5%"]``; otherwise it is drawn
    in the response's units without bounds.
``psi``
    ``edges`` (interior edges of the baseline's residual bins),
    ``baseline_shares``, ``fresh_shares``.
``cooks_distance``
    ``top_rows``: ``[{"key", "cooks_distance", ...}]``; ``cut_offs``: the
    ``cooks_*`` entries are drawn.
any check (first found)
    ``sample``: ``{"at": [...], "key": [...], "fitted": [...], "residual": [...]}``,
    a bounded sample of the window's rows in time order, and
    ``forecast_errors``: ``{"at": [...], "error": [...]}`` (the frozen baseline
    model's errors on fresh rows).  The nightly run does not store these yet;
    the report says so until it does.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import pandas as pd

from ._views import plain_value

__all__ = ["CusumTrace", "NightEvidence", "night_evidence"]

_CUT_OFF_LABELS = {"cooks_4_over_n": "4/n", "cooks_f_median": "F median", "cooks_1": "1"}


@dataclass(frozen=True, slots=True)
class CusumTrace:
    """The running-sum path a ``cusum`` check stored, with its bounds and change estimate.

    ``change_index`` is the position in ``path`` nearest to the estimated change row
    (``change_row``, 0-based among the window's rows); ``change_at`` is the change's
    key as an ISO instant when the key is a date-time.  ``scaled`` says whether the
    path is on the statistic's scale (then ``bound`` is the 5 % critical value).
    """

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
    scaled: bool
    change_row: int | None
    change_key: str | None


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


def _instants(values: Sequence[Any]) -> tuple[str, ...] | None:
    """The values as ISO instants when every one parses as a date-time, else None."""
    try:
        return tuple(dt.datetime.fromisoformat(str(v)).isoformat() for v in values)
    except ValueError:
        return None


def _cusum(row: Any) -> CusumTrace | None:
    detail = row.detail if isinstance(row.detail, Mapping) else {}
    change = detail.get("change")
    if not isinstance(change, Mapping):
        return None
    rows, values = change.get("path_rows"), change.get("path_values")
    if not _sequence(rows) or not _sequence(values) or not values or len(rows) != len(values):
        return None
    path = [float("nan") if v is None else float(v) for v in values]
    statistic = plain_value(row.statistic)
    critical = detail.get("critical_values", {}).get("5%") \
        if isinstance(detail.get("critical_values"), Mapping) else None
    largest = detail.get("largest_at_row")
    bound = None
    if statistic and largest in rows and path[rows.index(largest)]:
        scale = abs(path[rows.index(largest)]) / float(statistic)
        path = [v / scale for v in path]
        bound = float(critical) if critical is not None else None
    keys = change.get("path_keys")
    at = _instants(keys) if _sequence(keys) and len(keys) == len(path) else None
    change_row = change.get("row")
    index = None
    if change_row is not None:
        index = min(range(len(rows)), key=lambda i: abs(int(rows[i]) - int(change_row)))
    key = change.get("key")
    change_at = _instants([key])[0] if key is not None and _instants([key]) else None
    return CusumTrace(path=tuple(path), at=at, bound=bound, lower=None, upper=None,
                      change_index=index, change_at=change_at, statistic=statistic,
                      p_value=plain_value(row.p_value), verdict=str(row.verdict),
                      scaled=bound is not None, change_row=None if change_row is None
                      else int(change_row), change_key=None if key is None else str(key))


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
            names = ("edges", "baseline_shares", "fresh_shares")
            if all(_sequence(detail.get(k)) for k in names) and detail["baseline_shares"]:
                bins = {k: [float(v) for v in detail[k]] for k in names}
        elif row.check_name == "cooks_distance":
            found_rows = detail.get("top_rows")
            if _sequence(found_rows):
                top_rows = tuple(r for r in found_rows if isinstance(r, Mapping)
                                 and r.get("cooks_distance") is not None)
            found_cutoffs = detail.get("cut_offs")
            if isinstance(found_cutoffs, Mapping):
                cutoffs = {_CUT_OFF_LABELS.get(str(k), str(k)): float(v)
                           for k, v in found_cutoffs.items()
                           if str(k).startswith("cooks_") and v is not None}
        elif row.check_name == "cusum":
            cusum = _cusum(row)
    first = latest.iloc[0]
    return NightEvidence(run_id=int(first["run_id"]), night=plain_value(first["slot_at"]),
                         segment=segment, model=model, sample=sample, forecast_errors=forecast,
                         bins=bins, top_rows=top_rows, cutoffs=cutoffs, cusum=cusum)
