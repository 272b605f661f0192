"""Figures built straight from the store: the data lookups shared by the report and the CLI.

The drawing lives in :mod:`monitor.report._plots` (pure functions of frames);
this module fetches the frames for one monitor and segment and hands them over.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import pandas as pd
from matplotlib.figure import Figure

from . import _plots
from ._evidence import night_evidence
from ._views import nights_by_run, plain_value

__all__ = ["alert_marks", "gap_timeline", "latest_chosen", "view_figure"]


def gap_timeline(verdicts: pd.DataFrame, deltas: pd.DataFrame, segment: str) -> pd.DataFrame:
    """``slot_at``, ``gap`` (the chosen model's stored ``delta``) and ``best``, per night."""
    rows = verdicts[verdicts["segment"] == segment] if len(verdicts) else verdicts
    lookup = ({(int(r.run_id), r.model): plain_value(r.value)
               for r in deltas[deltas["segment"] == segment].itertuples(index=False)}
              if len(deltas) else {})
    gaps = [lookup.get((int(r.run_id), r.chosen_model)) for r in rows.itertuples(index=False)]
    return pd.DataFrame({"slot_at": rows["slot_at"].tolist() if len(rows) else [],
                         "gap": [float("nan") if g is None else g for g in gaps],
                         "best": rows["best_model"].tolist() if len(rows) else []})


def alert_marks(store: Any, monitor: str, segment: str, *, start: dt.datetime | None = None,
                end: dt.datetime | None = None) -> pd.DataFrame:
    """``at``: the nights on which an alert of the segment was seen (one row per night)."""
    events = store.alert_events(monitor)
    if not len(events):
        return pd.DataFrame({"at": []})
    night_of = nights_by_run(store, monitor)
    events = events[(events["segment"] == segment) & events["run_id"].notna()]
    nights = sorted({night_of[int(r)] for r in events["run_id"].tolist() if int(r) in night_of})
    nights = [n for n in nights if (start is None or n >= start) and (end is None or n < end)]
    return pd.DataFrame({"at": nights})


def latest_chosen(store: Any, monitor: str, segment: str) -> str | None:
    """The chosen model named by the segment's latest verdict (None before any)."""
    verdicts = store.verdict_history(monitor, segment=segment)
    return plain_value(verdicts["chosen_model"].iloc[-1]) if len(verdicts) else None


def view_figure(store: Any, monitor: str, view: str, *, metric: str, criterion: str,
                margin: float | None, model: str | None, segment: str,
                start: dt.datetime | None, end: dt.datetime | None) -> Figure | None:
    """The figure of a terminal view (None for views without one).

    verdicts: the criterion gap; metrics: the metric's trend with alerts,
    promotions and notes; coefficients: the paths of ``model`` (default the
    chosen one); checks: the running-sum path of the last night in range.
    """
    chosen = latest_chosen(store, monitor, segment)
    if view == "verdicts":
        verdicts = store.verdict_history(monitor, segment=segment, start=start, end=end)
        deltas = store.metric_trend(monitor, "delta", segment=segment, start=start, end=end)
        return _plots.criterion_gap_figure(gap_timeline(verdicts, deltas, segment),
                                           criterion=criterion, margin=margin, chosen=chosen)
    if view == "metrics":
        trend = store.metric_trend(monitor, metric, model=model, segment=segment, start=start,
                                   end=end)
        promotions = store.promotions(monitor)
        return _plots.metric_trend_figure(
            trend, metric=metric, chosen=chosen,
            alert_marks=alert_marks(store, monitor, segment, start=start, end=end),
            promotions=promotions[promotions["segment"] == segment] if len(promotions)
            else promotions,
            annotations=store.annotations(monitor, start=start, end=end))
    if view == "coefficients":
        name = model or chosen
        paths = store.coefficient_paths(monitor, model=name, segment=segment, start=start,
                                        end=end)
        return _plots.coefficient_paths_figure(paths, model=str(name))
    if view == "checks":
        name = model or chosen
        checks = store.check_trend(monitor, "cusum", model=name, segment=segment, start=start,
                                   end=end, with_detail=True)
        evidence = night_evidence(checks, model=str(name), segment=segment) if len(checks) \
            else None
        if evidence is None or evidence.cusum is None:
            return None
        trace = evidence.cusum
        return _plots.cusum_figure(trace.path, at=trace.at, bound=trace.bound, lower=trace.lower,
                                   upper=trace.upper, change_index=trace.change_index,
                                   change_at=trace.change_at, scaled=trace.scaled,
                                   subtitle=f"Running sum of the errors of {name}")
    return None
