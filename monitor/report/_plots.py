"""Figures of a monitor's history and of one night's errors (matplotlib, Agg backend).

Every function takes plain data (pandas frames as the history store returns
them, or arrays), draws it unchanged and returns a :class:`matplotlib.figure.Figure`;
nothing here computes a statistic.  Each data-bearing artist carries a ``gid``
(``"trend:<model>"``, ``"gap"``, ``"estimate:<term>"``, ``"cusum-path"``, ...), so a
test or a caller can read the plotted arrays back with :func:`artist_by_gid`.
Times are drawn as Matplotlib date numbers (days since 1970-01-01 UTC,
:func:`matplotlib.dates.date2num`).

Names from data (models, terms, row keys, notes) are drawn as literal text:
``$`` is escaped so it never starts math mode, and a leading ``_`` (which
Matplotlib would hide from a legend) is kept visible.

The layouts are regwarden's own: one question per figure, a left-aligned
title that states the question, and a line under it that says how to read it.
"""

from __future__ import annotations

import textwrap
from collections.abc import Mapping, Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")

import matplotlib.dates as mdates  # noqa: E402  (after choosing the backend)
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.artist import Artist  # noqa: E402
from matplotlib.axes import Axes  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

__all__ = [
    "artist_by_gid",
    "coefficient_paths_figure",
    "criterion_gap_figure",
    "cusum_figure",
    "error_bins_figure",
    "errors_by_fitted_figure",
    "errors_over_time_figure",
    "influential_rows_figure",
    "metric_trend_figure",
    "safe_text",
    "time_numbers",
]

#: regwarden's palette: the chosen model stands out, the other candidates stay quiet.
INK = "#1f2933"
MUTED = "#7b8794"
CHOSEN = "#0b6e69"
OTHERS = ("#b7791f", "#6b46c1", "#2b6cb0", "#9c4221", "#4a5568", "#97266d", "#276749")
ALERT = "#c53030"
PROMOTION = "#2c5282"
NOTE_FILL = "#d69e2e"
BAND = "#81e6d9"

_WIDTH = 8.4


def safe_text(value: Any) -> str:
    """``value`` as text Matplotlib draws literally (no math mode, never hidden)."""
    text = str(value).replace("$", r"\$")
    return " " + text if text.startswith("_") else text


def time_numbers(values: Any) -> np.ndarray:
    """Instants (aware datetimes, Timestamps, ISO strings) as Matplotlib date numbers (UTC)."""
    series = pd.to_datetime(pd.Series(list(values), dtype=object), utc=True)
    if len(series) == 0:
        return np.empty(0)
    return np.asarray(mdates.date2num(series.dt.tz_convert(None).to_numpy()), dtype=float)


def artist_by_gid(figure: Figure, gid: str) -> Artist:
    """The artist drawn with ``gid`` (KeyError naming the gids present when absent)."""
    found = figure.findobj(lambda artist: artist.get_gid() == gid)
    if not found:
        present = sorted({a.get_gid() for a in figure.findobj() if a.get_gid()})
        raise KeyError(f"no artist with gid {gid!r}; present: {present}")
    return found[0]


def _figure(height: float, rows: int = 1, *, sharex: bool = True) -> tuple[Figure, list[Axes]]:
    figure = Figure(figsize=(_WIDTH, height), layout="constrained")
    axes = figure.subplots(rows, 1, sharex=sharex, squeeze=False)[:, 0].tolist()
    for ax in axes:
        ax.spines[["top", "right"]].set_visible(False)
        ax.spines[["left", "bottom"]].set_color(MUTED)
        ax.tick_params(colors=INK, labelsize=8)
        ax.grid(axis="y", color="#e4e7eb", linewidth=0.8)
        ax.set_axisbelow(True)
    return figure, axes


def _heading(figure: Figure, title: str, how_to_read: str) -> None:
    """The question the figure answers (bold, left) and, under it, how to read it."""
    figure.suptitle(safe_text(title), x=0.01, ha="left", fontsize=11.5, color=INK,
                    fontweight="bold")
    first = figure.axes[0]
    first.set_title(safe_text(textwrap.fill(how_to_read, 120)), loc="left", fontsize=8,
                    color=MUTED, pad=10)


def _date_axis(ax: Axes) -> None:
    locator = mdates.AutoDateLocator(minticks=3, maxticks=8)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))


def _model_colours(models: Sequence[str], chosen: str | None) -> dict[str, str]:
    colours: dict[str, str] = {}
    others = [m for m in models if m != chosen]
    for index, model in enumerate(others):
        colours[model] = OTHERS[index % len(OTHERS)]
    if chosen is not None:
        colours[chosen] = CHOSEN
    return colours


def _mark_events(ax: Axes, promotions: pd.DataFrame | None,
                 annotations: pd.DataFrame | None) -> None:
    if annotations is not None and len(annotations):
        for index, row in enumerate(annotations.itertuples(index=False)):
            start, end = time_numbers([row.starts_at, row.ends_at])
            ax.axvspan(start, end, color=NOTE_FILL, alpha=0.14, linewidth=0,
                       gid=f"note:{index}")
            note = str(row.note)
            ax.text(start, 0.02, safe_text(note if len(note) <= 36 else note[:35] + "…"),
                    transform=ax.get_xaxis_transform(), fontsize=7, color="#975a16",
                    va="bottom", ha="left", gid=f"note-label:{index}")
    if promotions is not None and len(promotions):
        for index, row in enumerate(promotions.itertuples(index=False)):
            (at,) = time_numbers([row.promoted_at])
            ax.axvline(at, color=PROMOTION, linewidth=1.2, linestyle=(0, (4, 2)),
                       gid=f"promotion:{index}")
            ax.text(at, 0.97, safe_text(f" ⇢ {row.model}"), transform=ax.get_xaxis_transform(),
                    fontsize=7.5, color=PROMOTION, va="top", ha="left",
                    gid=f"promotion-label:{index}")


# ---------------------------------------------------------------------------- history


def metric_trend_figure(trend: pd.DataFrame, *, metric: str, chosen: str | None = None,
                        alert_marks: pd.DataFrame | None = None,
                        promotions: pd.DataFrame | None = None,
                        annotations: pd.DataFrame | None = None,
                        label: str | None = None) -> Figure:
    """One stored metric over the nights, a line per candidate, the chosen one in bold.

    Parameters
    ----------
    trend
        Rows of ``HistoryStore.metric_trend`` for one segment: ``slot_at``,
        ``model``, ``value``.
    alert_marks
        Instants at which alerts were seen (column ``at``): red marks along the top
        (``gid="alerts"``).
    promotions, annotations
        Frames of ``HistoryStore.promotions`` / ``annotations``: dashed verticals
        (``promotion:<i>``) and shaded spans (``note:<i>``).
    """
    figure, (ax,) = _figure(3.6)
    models = sorted(set(trend["model"])) if len(trend) else []
    colours = _model_colours(models, chosen)
    for model in sorted(models, key=lambda m: m == chosen):
        rows = trend[trend["model"] == model]
        is_chosen = model == chosen
        ax.plot(time_numbers(rows["slot_at"]), rows["value"].to_numpy(dtype=float),
                color=colours[model], linewidth=2.4 if is_chosen else 1.1,
                marker=None if is_chosen else ".", markersize=4, alpha=1.0 if is_chosen else 0.8,
                label=safe_text(f"{model} (chosen)" if is_chosen else model),
                gid=f"trend:{model}", zorder=3 if is_chosen else 2)
    if alert_marks is not None and len(alert_marks):
        ax.plot(time_numbers(alert_marks["at"]), np.full(len(alert_marks), 1.0),
                linestyle="none", marker="v", markersize=8, color=ALERT, clip_on=False,
                transform=ax.get_xaxis_transform(), label="alert seen", gid="alerts", zorder=4)
    _mark_events(ax, promotions, annotations)
    name = label or metric
    ax.set_ylabel(safe_text(name), fontsize=9, color=INK)
    _date_axis(ax)
    if models:
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=min(5, len(models) + 1),
                  frameon=False, fontsize=8)
    _heading(figure, f"{name}, night by night, for every candidate",
             "Each line is one candidate refitted every night; the bold line is the chosen "
             "model. Red marks: nights an alert was seen; dashed lines: promotions; shaded "
             "spans: notes.")
    return figure


def criterion_gap_figure(timeline: pd.DataFrame, *, criterion: str, margin: float | None = None,
                         chosen: str | None = None) -> Figure:
    """How far the chosen model trails the best candidate, night by night.

    ``timeline`` has ``slot_at``, ``gap`` (the chosen model's criterion minus the
    best one's) and ``best`` (the best candidate's name).  Stems rise from zero to
    the gap (``gid="gap"`` holds the points); hollow points mark nights on which
    the chosen model was the best; the new leader's name is written where the
    best candidate changed (``best-change:<i>``).
    """
    figure, (ax,) = _figure(3.3)
    x = time_numbers(timeline["slot_at"])
    gap = timeline["gap"].to_numpy(dtype=float)
    best = [str(b) for b in timeline["best"]]
    ax.vlines(x, 0.0, gap, color=MUTED, linewidth=1.0, gid="gap-stems")
    ax.plot(x, gap, linestyle="none", marker="o", markersize=4.5, color=ALERT,
            markerfacecolor=ALERT, gid="gap", label="chosen model trails")
    leading = np.array([b == chosen for b in best]) if chosen is not None else np.zeros(len(x),
                                                                                        bool)
    if leading.any():
        ax.plot(x[leading], gap[leading], linestyle="none", marker="o", markersize=5,
                color=CHOSEN, markerfacecolor="white", gid="gap-chosen-leads",
                label="chosen model is the best")
    if margin is not None:
        ax.axhline(margin, color=INK, linewidth=1.0, linestyle=(0, (1, 2)), gid="margin",
                   label=f"margin {margin:g}")
    count = 0
    for index in range(1, len(best)):
        if best[index] != best[index - 1]:
            ax.annotate(safe_text(f"{best[index]} leads"), (x[index], gap[index]),
                        xytext=(3, 8), textcoords="offset points", fontsize=7.5, color=INK,
                        gid=f"best-change:{count}")
            count += 1
    ax.set_ylabel(safe_text(f"Δ{criterion.upper()} chosen − best"), fontsize=9, color=INK)
    ax.set_ylim(bottom=0.0)
    _date_axis(ax)
    ax.legend(loc="upper left", frameon=False, fontsize=8)
    _heading(figure, f"How far the chosen model trails the best by {criterion.upper()}",
             "Zero means the chosen model was the best candidate that night; a stem above the "
             "dotted margin means another candidate was clearly better.")
    return figure


def coefficient_paths_figure(paths: pd.DataFrame, *, model: str,
                             terms: Sequence[str] | None = None) -> Figure:
    """Each coefficient of one model over the nights, with its confidence band.

    ``paths`` holds rows of ``HistoryStore.coefficient_paths`` for one model and
    segment (``slot_at``, ``term``, ``estimate``, ``ci_lower``, ``ci_upper``,
    ``ci_level``).  One strip per term, stacked on a shared time axis, because
    terms live on different scales.  Gids: ``estimate:<term>``,
    ``ci_lower:<term>``, ``ci_upper:<term>``, ``band:<term>``.
    """
    chosen_terms = list(terms) if terms is not None else list(dict.fromkeys(paths["term"]))
    rows = max(1, len(chosen_terms))
    figure, axes = _figure(1.45 * rows + 1.3, rows)
    level = None
    if len(paths) and "ci_level" in paths and paths["ci_level"].notna().any():
        level = float(paths["ci_level"].dropna().iloc[0])
    for ax, term in zip(axes, chosen_terms, strict=False):
        part = paths[paths["term"] == term]
        x = time_numbers(part["slot_at"])
        estimate = part["estimate"].to_numpy(dtype=float)
        lower = part["ci_lower"].to_numpy(dtype=float)
        upper = part["ci_upper"].to_numpy(dtype=float)
        ax.fill_between(x, lower, upper, color=BAND, alpha=0.45, linewidth=0, gid=f"band:{term}")
        ax.plot(x, lower, color=CHOSEN, linewidth=0.6, alpha=0.6, gid=f"ci_lower:{term}")
        ax.plot(x, upper, color=CHOSEN, linewidth=0.6, alpha=0.6, gid=f"ci_upper:{term}")
        ax.plot(x, estimate, color=CHOSEN, linewidth=1.8, gid=f"estimate:{term}")
        low, high = ax.get_ylim()
        if low <= 0.0 <= high:  # a zero line only where zero is in view (never rescales)
            ax.axhline(0.0, color=MUTED, linewidth=0.7, linestyle=(0, (1, 3)))
        ax.text(0.005, 0.96, safe_text(term), transform=ax.transAxes, fontsize=8.5,
                fontweight="bold", color=INK, va="top", ha="left",
                bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.8, "pad": 1.5})
    _date_axis(axes[-1])
    band = f"{level:.0%} confidence band" if level is not None else "confidence band"
    _heading(figure, f"Coefficients of {model}, night by night",
             f"Line: the estimate refitted each night; shaded: its {band}. A path leaving "
             "its earlier band is a coefficient that moved.")
    return figure


def cusum_figure(path: Sequence[float], *, at: Sequence[Any] | None = None,
                 bound: float | None = None, lower: Sequence[float] | None = None,
                 upper: Sequence[float] | None = None, change_index: int | None = None,
                 change_at: Any = None, scaled: bool = True,
                 subtitle: str | None = None) -> Figure:
    """The cumulative sum of one night's errors in time order, against its bounds.

    ``path`` is the scaled cumulative sum as the check stored it; ``at`` the
    instants of its points (positions 1..n when absent).  Bounds are either a
    constant ``bound`` (drawn at ±bound) or arrays ``lower``/``upper``.  The
    estimated change (``change_at``, else point ``change_index``) is a vertical
    line (``gid="change"``).  ``scaled=False`` labels the axis in the response's
    units (a path that could not be put on the statistic's scale).  Gids:
    ``cusum-path``, ``bound-upper``, ``bound-lower``.
    """
    figure, (ax,) = _figure(3.4)
    values = np.asarray(path, dtype=float)
    dated = at is not None and len(at) == len(values)
    x = time_numbers(at) if dated else np.arange(1, len(values) + 1, dtype=float)
    if upper is not None and lower is not None:
        top, bottom = np.asarray(upper, dtype=float), np.asarray(lower, dtype=float)
    elif bound is not None:
        top, bottom = np.full(len(values), float(bound)), np.full(len(values), -float(bound))
    else:
        top = bottom = None
    if top is not None and bottom is not None:
        ax.plot(x, top, color=ALERT, linewidth=1.0, linestyle=(0, (5, 2)), gid="bound-upper",
                label="bounds")
        ax.plot(x, bottom, color=ALERT, linewidth=1.0, linestyle=(0, (5, 2)), gid="bound-lower")
    ax.plot(x, values, color=INK, linewidth=1.4, gid="cusum-path", label="running sum")
    ax.axhline(0.0, color=MUTED, linewidth=0.7)
    position = None
    if change_at is not None and dated:
        (position,) = time_numbers([change_at])
    elif change_index is not None and 0 <= int(change_index) < len(values):
        position = float(x[int(change_index)])
    if position is not None:
        ax.axvline(position, color=PROMOTION, linewidth=1.6, gid="change",
                   label="estimated change")
    if dated:
        _date_axis(ax)
    else:
        ax.set_xlabel("row in time order", fontsize=9, color=INK)
    ax.set_ylabel("running sum / √(n·σ̂²)" if scaled else "running sum (response units)",
                  fontsize=9, color=INK)
    ax.legend(loc="upper left", frameon=False, fontsize=8)
    _heading(figure, subtitle or "Running sum of the errors against its bounds",
             "Errors of a stable model wander around zero; a path that drifts through a bound "
             "says the errors stopped averaging out. The vertical line is the estimated date "
             "of the change.")
    return figure


# ---------------------------------------------------------------------------- one night


def errors_over_time_figure(at: Sequence[Any], residual: Sequence[float], *,
                            forecast_at: Sequence[Any] | None = None,
                            forecast_error: Sequence[float] | None = None,
                            title: str | None = None) -> Figure:
    """One night's errors in time order: in-window residuals (``gid="residuals"``) and, when
    given, the frozen baseline model's forecast errors (``gid="forecast-errors"``)."""
    figure, (ax,) = _figure(3.2)
    ax.plot(time_numbers(at), np.asarray(residual, dtype=float), linestyle="none", marker=".",
            markersize=3.5, color=CHOSEN, alpha=0.75, gid="residuals",
            label="residual of tonight's fit")
    if forecast_error is not None and forecast_at is not None:
        ax.plot(time_numbers(forecast_at), np.asarray(forecast_error, dtype=float),
                linestyle="none", marker="x", markersize=3.5, color=OTHERS[0], alpha=0.75,
                gid="forecast-errors", label="error of the baseline model's forecast")
    ax.axhline(0.0, color=INK, linewidth=0.8)
    ax.set_ylabel("observed − predicted", fontsize=9, color=INK)
    _date_axis(ax)
    ax.legend(loc="upper left", frameon=False, fontsize=8)
    _heading(figure, title or "Errors through the window",
             "Points should scatter evenly around zero across the whole window; a run of "
             "points on one side, or a widening spread, is what the time-order checks react to.")
    return figure


def errors_by_fitted_figure(fitted: Sequence[float], residual: Sequence[float], *,
                            title: str | None = None) -> Figure:
    """One night's residuals against the fitted values (``gid="errors-by-fitted"``)."""
    figure, (ax,) = _figure(3.2)
    ax.plot(np.asarray(fitted, dtype=float), np.asarray(residual, dtype=float),
            linestyle="none", marker="o", markersize=3, color=CHOSEN, alpha=0.55,
            markeredgewidth=0, gid="errors-by-fitted")
    ax.axhline(0.0, color=INK, linewidth=0.8)
    ax.set_xlabel("predicted value", fontsize=9, color=INK)
    ax.set_ylabel("observed − predicted", fontsize=9, color=INK)
    _heading(figure, title or "Errors along the range of predictions",
             "A funnel (spread growing with the prediction) is what the constant-variance "
             "checks react to; a bend is what the functional-form check reacts to.")
    return figure


def error_bins_figure(edges: Sequence[float], baseline_share: Sequence[float],
                      fresh_share: Sequence[float], *, title: str | None = None) -> Figure:
    """Share of errors per bin of the baseline's residuals: baseline against tonight.

    ``edges`` are the bins' interior edges (one fewer than the bins; the first and
    last bins are open-ended) or all edges (one more than the bins).  One row per
    bin (labelled by its edges), a hollow point for the baseline's
    share (``gid="baseline-share"``) and a filled point for tonight's
    (``gid="fresh-share"``), joined by a bar (``gid="bin-shift"``) whose length is
    the change.
    """
    base = np.asarray(baseline_share, dtype=float)
    fresh = np.asarray(fresh_share, dtype=float)
    bounds = np.asarray(edges, dtype=float)
    figure, (ax,) = _figure(0.28 * len(base) + 1.9)
    rows = np.arange(len(base), dtype=float)
    ax.hlines(rows, np.minimum(base, fresh), np.maximum(base, fresh), color=MUTED,
              linewidth=3, alpha=0.6, gid="bin-shift")
    ax.plot(base, rows, linestyle="none", marker="o", markersize=6, markerfacecolor="white",
            color=INK, gid="baseline-share", label="baseline")
    ax.plot(fresh, rows, linestyle="none", marker="o", markersize=6, color=ALERT,
            gid="fresh-share", label="tonight")
    if len(bounds) == len(base) - 1:  # interior edges: open-ended first and last bins
        bounds = np.concatenate([[-np.inf], bounds, [np.inf]])
    labels = []
    for index in range(len(base)):
        if len(bounds) != len(base) + 1:
            labels.append(f"bin {index + 1}")
        elif np.isneginf(bounds[index]):
            labels.append(f"below {bounds[index + 1]:.3g}")
        elif np.isposinf(bounds[index + 1]):
            labels.append(f"{bounds[index]:.3g} and above")
        else:
            labels.append(f"{bounds[index]:.3g} to {bounds[index + 1]:.3g}")
    ax.set_yticks(rows, labels)
    ax.invert_yaxis()
    ax.grid(axis="x", color="#e4e7eb", linewidth=0.8)
    ax.set_xlabel("share of errors in the bin", fontsize=9, color=INK)
    ax.legend(loc="lower right", frameon=False, fontsize=8)
    _heading(figure, title or "Tonight's errors in the baseline's bins",
             "Bins are the baseline's residual bins (low errors at the top). Long bars mean "
             "tonight's errors sit elsewhere than the baseline's: what the drift checks react to.")
    return figure


def influential_rows_figure(keys: Sequence[Any], values: Sequence[float], *,
                            measure: str = "Cook's distance",
                            cutoffs: Mapping[str, float] | None = None,
                            title: str | None = None) -> Figure:
    """The rows with the largest influence, by key: one horizontal bar each, largest on top.

    The bars are drawn in the order given (``gid="influence:<i>"`` for bar i);
    ``cutoffs`` (label -> value) are dotted verticals (``cutoff:<label>``).
    """
    names = [safe_text(key) for key in keys]
    heights = np.asarray(values, dtype=float)
    figure, (ax,) = _figure(0.26 * len(names) + 1.9)
    rows = np.arange(len(names), dtype=float)
    bars = ax.barh(rows, heights, color=CHOSEN, alpha=0.8, height=0.62)
    for index, bar in enumerate(bars):
        bar.set_gid(f"influence:{index}")
    for label, value in (cutoffs or {}).items():
        ax.axvline(float(value), color=ALERT, linewidth=1.0, linestyle=(0, (1, 2)),
                   gid=f"cutoff:{label}")
        ax.text(float(value), 1.0, safe_text(f" {label}"), transform=ax.get_xaxis_transform(),
                fontsize=7, color=ALERT, va="bottom", ha="left")
    ax.set_yticks(rows, names, fontsize=8)
    ax.invert_yaxis()
    ax.grid(axis="x", color="#e4e7eb", linewidth=0.8)
    ax.set_xlabel(safe_text(measure), fontsize=9, color=INK)
    _heading(figure, title or "Rows that pull hardest on tonight's fit",
             "Each bar is one row, named by its key; look these rows up in the source before "
             "trusting or discarding them.")
    return figure
