"""The self-contained HTML report of one monitor: one file, inline SVG, no script, no network.

:func:`render_report` reads the history store and returns the page as a string;
:func:`write_report` writes it to a file.  Every value that came from data or
config (names, messages, notes, evidence, formulas) passes through
:func:`html.escape`; figures are inlined as SVG text written by Matplotlib
(which escapes its text); a Content-Security-Policy forbids scripts, frames,
forms and every network fetch, so the page cannot run or load anything even if a
value slipped through.

Sections, in order: what the monitor watches; where things stand (the current
verdict in one sentence, per segment); open alerts with their evidence; since
when (first sightings and the estimated change date); the candidates on the
latest night; the nights so far (figures); the latest night up close (figures
of what the checks saw); the checks of the latest night with their references;
promotions and notes; reading this report with care.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import html
import io
import json
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import matplotlib
import pandas as pd

from . import _plots
from ._changes import what_changed
from ._evidence import NightEvidence, night_evidence
from ._figures import alert_marks, gap_timeline
from ._views import nights_by_run, notes, plain_value

__all__ = ["CAUTIONS", "figure_svg", "render_report", "write_report"]

#: What every report says about reading it (the project's rule, in plain words).
CAUTIONS = (
    "An alert is statistical evidence, not proof. It says the numbers moved further than "
    "chance alone would usually move them; it does not say why, or what to do.",
    "People who know the data, the process behind it and the decisions the model feeds decide "
    "what to do: promote another candidate, refit on a new baseline, fix the data upstream, or "
    "leave things as they are.",
    "Many checks run every night on overlapping windows, so some will flag by chance alone; a "
    "signal that persists over several nights and agrees with other checks deserves more "
    "weight than a single red cell.",
    "Checks marked as computed on a sample, and approximate p-values, are stated as such in the "
    "checks table. Thresholds marked as common practice have no single published source.",
)

_RANKING_METRICS = ("delta", "weight", "adj_r_squared", "r_squared", "sigma", "n", "f_pvalue")

_CSS = """
:root { --ink:#1f2933; --muted:#616e7c; --line:#d9dee4; --paper:#fbfaf7; --teal:#0b6e69;
        --alert:#c53030; --warn:#b7791f; --ok:#2f855a; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
       font:15px/1.5 "Iowan Old Style","Palatino Linotype",Georgia,serif; }
header.masthead { background:#16302e; color:#f0f4f3; padding:28px 6vw 22px; }
header.masthead .kicker { font:600 12px/1 system-ui,sans-serif; letter-spacing:.14em;
       text-transform:uppercase; color:#9fd3cc; }
header.masthead h1 { margin:.35em 0 .2em; font-size:30px; font-weight:600; }
header.masthead p { margin:0; color:#c9dad8; font-size:14px; }
main { padding:8px 6vw 60px; max-width:1180px; }
section { margin-top:34px; }
h2 { font:600 13px/1.2 system-ui,sans-serif; letter-spacing:.12em; text-transform:uppercase;
     color:var(--teal); border-top:2px solid var(--teal); padding-top:10px; margin:0 0 12px; }
h3 { font-size:17px; margin:18px 0 6px; }
p.lede { font-size:19px; line-height:1.45; margin:6px 0 10px; }
.standing { border-left:6px solid var(--ok); background:#fff; padding:12px 16px; margin:10px 0; }
.standing.attention { border-left-color:var(--alert); }
.standing .segment { font:600 12px system-ui,sans-serif; color:var(--muted);
                     text-transform:uppercase; letter-spacing:.08em; }
table { border-collapse:collapse; width:100%; margin:8px 0 4px; background:#fff;
        font:13px/1.35 system-ui,sans-serif; }
th { text-align:left; font-weight:600; color:var(--muted); border-bottom:1.5px solid var(--ink);
     padding:6px 8px; }
td { border-bottom:1px solid var(--line); padding:5px 8px; vertical-align:top; }
td.num { text-align:right; font-variant-numeric:tabular-nums; white-space:nowrap; }
tr.is-chosen td:first-child { font-weight:700; }
.tag { display:inline-block; font:600 11px/1.6 system-ui,sans-serif; padding:0 7px;
       border-radius:9px; background:#e6eceb; color:var(--ink); white-space:nowrap; }
.tag.fail, .tag.open, .tag.critical { background:#fde2e1; color:#9b2c2c; }
.tag.warn, .tag.acknowledged, .tag.snoozed, .tag.warning { background:#fdf0d5; color:#7b4f0c; }
.tag.pass, .tag.resolved { background:#dcf1e4; color:#22543d; }
.alert { background:#fff; border:1px solid var(--line); border-top:4px solid var(--alert);
         padding:10px 14px; margin:12px 0; }
.alert h3 { margin:2px 0 4px; font-size:16px; }
.alert dl { display:grid; grid-template-columns:max-content 1fr; gap:2px 14px; margin:8px 0 0;
            font:13px/1.4 system-ui,sans-serif; }
.alert dt { color:var(--muted); }
.alert dd { margin:0; word-break:break-word; }
figure.chart { background:#fff; border:1px solid var(--line); margin:14px 0; padding:10px; }
figure.chart svg { width:100%; height:auto; display:block; }
figcaption { font:13px/1.45 system-ui,sans-serif; color:var(--muted); margin-top:6px; }
.missing { font:13px system-ui,sans-serif; color:var(--muted); font-style:italic; }
.watch dl { display:grid; grid-template-columns:max-content 1fr; gap:3px 16px; }
.watch dt { color:var(--muted); font:13px system-ui,sans-serif; padding-top:2px; }
.watch dd { margin:0; }
code { font:12.5px ui-monospace,Menlo,Consolas,monospace; background:#eef1f0; padding:0 3px; }
ul.cautions li { margin:6px 0; }
footer { margin-top:40px; font:12px system-ui,sans-serif; color:var(--muted); }
"""

_CSP = ("default-src 'none'; script-src 'none'; style-src 'unsafe-inline'; img-src data:; "
        "font-src 'none'; connect-src 'none'; frame-src 'none'; form-action 'none'; "
        "base-uri 'none'")


# ---------------------------------------------------------------------------- small helpers


def _e(value: Any) -> str:
    """Escaped text of any value (the ONE way data reaches the page)."""
    return html.escape("" if value is None else str(value), quote=True)


def _slug(text: str) -> str:
    kept = "".join(c if c.isalnum() else "-" for c in text.lower()).strip("-")
    digest = hashlib.sha256(text.encode()).hexdigest()[:6] if kept != text.lower() else ""
    return (kept[:40] + ("-" + digest if digest else "")) or "all"


def _number(value: Any, digits: int = 4) -> str:
    value = plain_value(value)
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        if not math.isfinite(value):
            return "—"
        if value != 0 and (abs(value) >= 1e6 or abs(value) < 1e-3):
            return f"{value:.{digits - 1}e}"
        return f"{value:.{digits}g}" if abs(value) < 1000 else f"{value:,.1f}"
    return str(value)


def _p(value: Any) -> str:
    value = plain_value(value)
    if value is None or not math.isfinite(float(value)):
        return "—"
    return "< 1e-16" if value < 1e-16 else (f"{value:.2e}" if value < 1e-3 else f"{value:.3f}")


def _night(value: Any) -> str:
    value = plain_value(value)
    if value is None:
        return "—"
    if isinstance(value, str):
        try:
            value = dt.datetime.fromisoformat(value)
        except ValueError:
            return value
        if value.tzinfo is None:
            value = value.replace(tzinfo=dt.UTC)
    moment = value.astimezone(dt.UTC)
    if moment.time() == dt.time(0, 0):
        return moment.strftime("%Y-%m-%d")
    return moment.strftime("%Y-%m-%d %H:%M UTC")


def _tag(text: Any) -> str:
    word = _e(text)
    return f'<span class="tag {_e(str(text).lower())}">{word}</span>'


def _table(headers: Sequence[str], rows: Iterable[Sequence[str]], *,
           numeric: Sequence[bool] | None = None,
           row_classes: Sequence[str] | None = None) -> str:
    """A table whose cells are ALREADY-escaped HTML fragments."""
    heads = "".join(f"<th>{_e(h)}</th>" for h in headers)
    body = []
    for index, row in enumerate(rows):
        cells = "".join(
            f'<td class="num">{cell}</td>' if numeric and numeric[i] else f"<td>{cell}</td>"
            for i, cell in enumerate(row))
        css = f' class="{_e(row_classes[index])}"' if row_classes and row_classes[index] else ""
        body.append(f"<tr{css}>{cells}</tr>")
    return f"<table><thead><tr>{heads}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def figure_svg(figure: Any, prefix: str) -> str:
    """The figure as an inline ``<svg>`` element (text kept as text; artist ids prefixed)."""
    renamed = []
    for artist in figure.findobj(lambda a: a.get_gid() is not None):
        renamed.append((artist, artist.get_gid()))
        artist.set_gid(f"{prefix}-{artist.get_gid()}")
    buffer = io.StringIO()
    try:
        with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": prefix}):
            figure.savefig(buffer, format="svg", metadata={"Date": None})
    finally:
        for artist, gid in renamed:
            artist.set_gid(gid)
    text = buffer.getvalue()
    return text[text.index("<svg"):]


@dataclass
class _Page:
    """Figures collected while rendering (id -> caption), for the report's own index."""

    figures: list[str] = field(default_factory=list)

    def figure(self, figure_id: str, figure: Any, caption: str) -> str:
        self.figures.append(figure_id)
        svg = figure_svg(figure, figure_id)
        figure.clear()
        return (f'<figure class="chart" id="{_e(figure_id)}">{svg}'
                f"<figcaption>{_e(caption)}</figcaption></figure>")


# ---------------------------------------------------------------------------- the report


def _monitor_spec(spec: Any, monitor: str) -> Any:
    if spec is None:
        return None
    if hasattr(spec, "monitors"):
        return spec.monitor(monitor)
    return spec


def _references() -> dict[str, str]:
    """Published sources of the check ids, from the checks registry (when installed)."""
    try:
        from monitor.stats.checks._result import CHECKS
    except ImportError:
        return {}
    return {name: entry.reference for name, entry in CHECKS.items()}


def render_report(store: Any, monitor: str, *, spec: Any = None,
                  segments: Sequence[str] | None = None,
                  now: dt.datetime | None = None) -> str:
    """The report of ``monitor`` as one HTML document (see the module notes).

    Parameters
    ----------
    store
        A :class:`storage.history.HistoryStore`.
    monitor
        The monitor's name in the store.
    spec
        The monitor spec (:class:`monitor.runs.spec.Spec` or its ``MonitorSpec``),
        for the section on what the monitor watches; without it the section
        lists what the history shows.
    segments
        Segments to draw figures for; by default those with open alerts or whose
        chosen model is not the best on the latest night, else all when there are
        at most three, else the first.
    now
        The instant printed as the report's time (default: the current time).
    """
    monitor_spec = _monitor_spec(spec, monitor)
    moment = (now or dt.datetime.now(dt.UTC)).astimezone(dt.UTC)
    page = _Page()
    runs = store.runs(monitor)
    verdicts = store.verdict_history(monitor, with_detail=True)
    alerts = store.alerts(monitor)
    live_alerts = alerts[alerts["state"] != "resolved"] if len(alerts) else alerts
    criterion = (monitor_spec.family.criterion if monitor_spec is not None
                 else (str(verdicts["criterion"].iloc[-1]) if len(verdicts) else "aic"))
    latest = _latest_verdicts(verdicts)
    all_segments = sorted(latest) or [""]
    focus = list(segments) if segments is not None else _focus(latest, live_alerts)
    completed = runs[runs["status"] == "completed"] if len(runs) else runs
    failed = int((runs["status"] == "failed").sum()) if len(runs) else 0
    first_night = plain_value(completed["slot_at"].iloc[0]) if len(completed) else None
    last_night = plain_value(completed["slot_at"].iloc[-1]) if len(completed) else None

    parts: list[str] = []
    parts.append(_watch_section(monitor, monitor_spec, store, criterion, runs, failed,
                                first_night, last_night))
    parts.append(_standing_section(latest, live_alerts, criterion, all_segments))
    parts.append(_alerts_section(live_alerts, nights_by_run(store, monitor)))
    parts.append(_since_when_section(store, monitor, latest))
    parts.append(_ranking_section(store, monitor, latest, criterion, monitor_spec, last_night))
    parts.append(_trends_section(page, store, monitor, focus, latest, criterion, verdicts,
                                 monitor_spec))
    checks = (store.check_trend(monitor, None, with_detail=True, start=last_night)
              if last_night is not None else pd.DataFrame())
    parts.append(_latest_night_section(page, checks, focus, latest))
    parts.append(_checks_section(checks, latest, focus))
    parts.append(_notes_section(store, monitor))
    parts.append(_cautions_section())
    body = "\n".join(parts)
    title = f"regwarden report: {monitor}"
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        '<meta name="referrer" content="no-referrer">'
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>"
        '<header class="masthead"><div class="kicker">regwarden · model watch report</div>'
        f'<h1 id="monitor-name">{_e(monitor)}</h1>'
        f"<p>History from {_e(_night(first_night))} to {_e(_night(last_night))} · written "
        f"{_e(moment.strftime('%Y-%m-%d %H:%M UTC'))} · store {_e(store.describe())}</p>"
        f"</header><main>{body}"
        f'<footer data-figures="{_e(" ".join(page.figures))}">Written by regwarden '
        f"{_e(_version())}. This file is self-contained: it loads nothing and runs no "
        "script.</footer></main></body></html>\n")


def write_report(store: Any, monitor_name: str, out_path: str | Path, *, spec: Any = None,
                 segments: Sequence[str] | None = None,
                 now: dt.datetime | None = None) -> Path:
    """Write :func:`render_report` to ``out_path`` (UTF-8); returns the path written."""
    path = Path(out_path)
    text = render_report(store, monitor_name, spec=spec, segments=segments, now=now)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")
    return path


def _version() -> str:
    from monitor import __version__

    return __version__


def _latest_verdicts(verdicts: pd.DataFrame) -> dict[str, Mapping[str, Any]]:
    latest: dict[str, Mapping[str, Any]] = {}
    for record in verdicts.to_dict("records"):
        latest[str(record["segment"])] = record
    return latest


def _focus(latest: Mapping[str, Mapping[str, Any]], live_alerts: pd.DataFrame) -> list[str]:
    names = sorted(latest)
    if not names:
        return [""]
    alerted = set(live_alerts["segment"]) if len(live_alerts) else set()
    flagged = [s for s in names if s in alerted or latest[s].get("is_chosen_best") is False]
    if flagged:
        return flagged
    return names if len(names) <= 3 else names[:1]


def _segment_label(segment: str) -> str:
    return f"segment {segment}" if segment else "whole data set"


# ---------------------------------------------------------------------------- sections


def _watch_section(monitor: str, monitor_spec: Any, store: Any, criterion: str,
                   runs: pd.DataFrame, failed: int, first: Any, last: Any) -> str:
    items: list[tuple[str, str]] = []
    if monitor_spec is not None:
        family = monitor_spec.family
        if monitor_spec.description:
            items.append(("About", _e(monitor_spec.description)))
        items.append(("Forecasts", f"<code>{_e(family.response)}</code>"))
        candidates = "<br>".join(
            f"<code>{_e(name)}</code>: <code>{_e(formula)}</code>"
            + (" <span class=\"tag\">chosen</span>" if name == family.chosen else "")
            for name, formula in family.candidates.items())
        items.append(("Candidates", candidates))
        items.append(("Judged by", f"{_e(criterion.upper())}, with a margin of "
                      f"{_e(_number(family.margin))} before another candidate counts as "
                      "clearly better"))
        source = monitor_spec.source
        where = source.path if source.kind == "parquet" else (source.table or "a SQL query")
        items.append(("Reads", f"{_e(source.kind)} source {_e(where)}, time column "
                      f"<code>{_e(source.time_column)}</code>"))
        days = monitor_spec.windows.fresh.total_seconds() / 86400
        items.append(("Window", f"the {_e(_number(days))} day(s) before each run"))
        if monitor_spec.segment_column:
            items.append(("One verdict per", f"value of <code>{_e(monitor_spec.segment_column)}"
                          "</code>"))
    else:
        paths = store.coefficient_paths(monitor)
        models = sorted(set(paths["model"])) if len(paths) else []
        items.append(("Candidates seen", ", ".join(f"<code>{_e(m)}</code>" for m in models)
                      or "none yet"))
        items.append(("Judged by", _e(criterion.upper())))
        items.append(("Note", "no monitor spec was given, so this section shows only what the "
                      "history holds"))
    completed = int((runs["status"] == "completed").sum()) if len(runs) else 0
    items.append(("Nights on record", f"{completed} completed, {failed} failed, from "
                  f"{_e(_night(first))} to {_e(_night(last))}"))
    rows = "".join(f"<dt>{_e(k)}</dt><dd>{v}</dd>" for k, v in items)
    return (f'<section id="watch" class="watch"><h2>What this monitor watches</h2>'
            f"<dl>{rows}</dl></section>")


def _sentence(record: Mapping[str, Any], criterion: str) -> str:
    detail = record.get("detail")
    if isinstance(detail, Mapping) and detail.get("summary"):
        return str(detail["summary"])
    chosen, best = record.get("chosen_model"), record.get("best_model")
    if chosen is None or best is None:
        return "No verdict was recorded on the latest night."
    if chosen == best:
        return f"'{chosen}' is the best candidate by {criterion.upper()}."
    return f"'{chosen}' is no longer the best candidate by {criterion.upper()}: '{best}' is."


def _standing_section(latest: Mapping[str, Mapping[str, Any]], live_alerts: pd.DataFrame,
                      criterion: str, segments: Sequence[str]) -> str:
    blocks = []
    for segment in segments:
        record = latest.get(segment)
        if record is None:
            blocks.append('<div class="standing"><p class="lede">No completed night yet.</p>'
                          "</div>")
            continue
        seg_alerts = (live_alerts[live_alerts["segment"] == segment] if len(live_alerts)
                      else live_alerts)
        open_count = int((seg_alerts["state"] == "open").sum()) if len(seg_alerts) else 0
        attention = open_count > 0 or record.get("is_chosen_best") is False
        status = (f"{open_count} open alert{'s' if open_count != 1 else ''}" if open_count
                  else "no open alerts")
        label = _segment_label(segment) if len(segments) > 1 or segment else ""
        head = f'<div class="segment">{_e(label)}</div>' if label else ""
        blocks.append(
            f'<div class="standing{" attention" if attention else ""}" '
            f'data-segment="{_e(segment)}">{head}'
            f'<p class="lede verdict">{_e(_sentence(record, criterion))}</p>'
            f"<p>Night of {_e(_night(record.get('slot_at')))} · {_e(status)}</p></div>")
    return (f'<section id="standing"><h2>Where things stand</h2>{"".join(blocks)}</section>')


def _evidence_items(evidence: Any) -> str:
    if not isinstance(evidence, Mapping) or not evidence:
        return "<dt>evidence</dt><dd>none stored</dd>"
    items = []
    for key, value in evidence.items():
        if isinstance(value, (Mapping, list, tuple)):
            shown = json.dumps(value, ensure_ascii=False, default=str)
            shown = shown if len(shown) <= 400 else shown[:399] + "…"
        elif isinstance(value, float):
            shown = _number(value, 6)
        else:
            shown = str(value)
        items.append(f"<dt>{_e(key)}</dt><dd>{_e(shown)}</dd>")
    return "".join(items)


def _alerts_section(live_alerts: pd.DataFrame, night_of: Mapping[int, Any]) -> str:
    if not len(live_alerts):
        body = "<p>No alert is open, acknowledged or snoozed.</p>"
    else:
        cards = []
        order = {"open": 0, "acknowledged": 1, "snoozed": 2}
        ordered = sorted(live_alerts.to_dict("records"),
                         key=lambda a: (order.get(a["state"], 3), str(a["segment"]),
                                        str(a["kind"])))
        for alert in ordered:
            first = plain_value(alert.get("first_seen_run_id"))
            last = plain_value(alert.get("last_seen_run_id"))
            where = _segment_label(str(alert["segment"]))
            cards.append(
                f'<article class="alert" data-alert-id="{_e(alert["alert_id"])}">'
                f"{_tag(alert['state'])} {_tag(alert['severity'])}"
                f"<h3>{_e(alert['kind'])} · {_e(alert['model'])} · {_e(where)}</h3>"
                f'<p class="message">{_e(alert["message"])}</p><dl>'
                f"<dt>first seen</dt><dd>{_e(_night(night_of.get(first)))}</dd>"
                f"<dt>latest seen</dt><dd>{_e(_night(night_of.get(last)))}</dd>"
                f"{_evidence_items(alert.get('evidence'))}</dl></article>")
        body = "".join(cards)
    return f'<section id="alerts"><h2>Open alerts and their evidence</h2>{body}</section>'


def _since_when_section(store: Any, monitor: str,
                        latest: Mapping[str, Mapping[str, Any]]) -> str:
    changes = what_changed(store, monitor, top=50)

    def is_chosen(segment: str, model: str) -> bool:
        return latest.get(segment, {}).get("chosen_model") == model

    items = []
    for sighting in changes.alerts:
        if sighting.state_now == "resolved":
            continue
        items.append(f"<li><b>{_e(sighting.kind)}</b> on <code>{_e(sighting.model)}</code> "
                     f"({_e(_segment_label(sighting.segment))}): first seen on the night of "
                     f"{_e(_night(sighting.first_night))}.</li>")
    for change in changes.best_changes[-5:]:
        items.append(f"<li>On the night of {_e(_night(change.night))} "
                     f"<code>{_e(change.best_now)}</code> took the lead from "
                     f"<code>{_e(change.best_before)}</code> "
                     f"({_e(_segment_label(change.segment))}).</li>")
    for estimate in (e for e in changes.change_estimates if is_chosen(e.segment, e.model)):
        when = estimate.change_at if estimate.change_at is not None else \
            f"row {estimate.change_index} of the window"
        items.append(f"<li>Estimated change date for <code>{_e(estimate.model)}</code> "
                     f"({_e(_segment_label(estimate.segment))}): <b>{_e(_night(when))}</b>, "
                     f"from the {_e(estimate.source)} (statistic "
                     f"{_e(_number(estimate.statistic))}, p {_e(_p(estimate.p_value))}).</li>")
    moved = [m for m in changes.coefficients
             if m.shift_in_std_errors is not None and is_chosen(m.segment, m.model)]
    for move in moved[:3]:
        items.append(f"<li>Coefficient <code>{_e(move.term)}</code> of "
                     f"<code>{_e(move.model)}</code> moved "
                     f"{_e(_number(move.shift_in_std_errors, 3))} standard errors since "
                     f"{_e(_night(changes.reference_night))}.</li>")
    body = f"<ul>{''.join(items)}</ul>" if items else "<p>Nothing has moved so far.</p>"
    return (f'<section id="since-when"><h2>Since when</h2>{body}<p class="missing">Moves in '
            "standard errors use the earlier night's standard error; nightly windows overlap, "
            "so they are a yardstick, not a test.</p></section>")


def _ranking_section(store: Any, monitor: str, latest: Mapping[str, Mapping[str, Any]],
                     criterion: str, monitor_spec: Any, last_night: Any) -> str:
    if last_night is None:
        return ('<section id="ranking"><h2>The candidates on the latest night</h2>'
                "<p>No completed night yet.</p></section>")
    values: dict[tuple[str, str, str], Any] = {}
    for metric in (criterion, *_RANKING_METRICS):
        frame = store.metric_trend(monitor, metric, start=last_night)
        for record in frame.itertuples(index=False):
            values[(record.segment, record.model, metric)] = plain_value(record.value)
    formulas = dict(monitor_spec.family.candidates) if monitor_spec is not None else {}
    blocks = []
    for segment, record in sorted(latest.items()):
        models = sorted({m for (s, m, _k) in values if s == segment},
                        key=lambda m: (values.get((segment, m, "delta")) is None,
                                       values.get((segment, m, "delta")) or 0.0, m))
        rows, classes = [], []
        for model in models:
            tags = []
            if model == record.get("chosen_model"):
                tags.append('<span class="tag">chosen</span>')
            if model == record.get("best_model"):
                tags.append('<span class="tag pass">best</span>')
            get = values.get
            rows.append([
                f"{_e(model)} {' '.join(tags)}",
                f"<code>{_e(formulas[model])}</code>" if model in formulas else "—",
                _e(_number(get((segment, model, criterion)), 6)),
                _e(_number(get((segment, model, "delta")), 3)),
                _e(_number(get((segment, model, "weight")), 3)),
                _e(_number(get((segment, model, "adj_r_squared")), 4)),
                _e(_number(get((segment, model, "sigma")), 4)),
                _e(_number(get((segment, model, "n")))),
                _e(_p(get((segment, model, "f_pvalue"))))])
            classes.append("is-chosen" if model == record.get("chosen_model") else "")
        heading = f"<h3>{_e(_segment_label(segment))}</h3>" if segment else ""
        blocks.append(heading + _table(
            ["candidate", "formula", criterion.upper(), f"Δ{criterion.upper()}",
             "weight", "adjusted R²", "residual SD", "rows", "overall F p"], rows,
            numeric=[False, False, True, True, True, True, True, True, True],
            row_classes=classes))
    return (f'<section id="ranking"><h2>The candidates on the latest night</h2>'
            f"<p>Night of {_e(_night(last_night))}; best first. Δ is each candidate's "
            f"{_e(criterion.upper())} minus the best one's; weights are the candidates' "
            f"{_e(criterion.upper())} weights.</p>{''.join(blocks)}</section>")


def _trends_section(page: _Page, store: Any, monitor: str, focus: Sequence[str],
                    latest: Mapping[str, Mapping[str, Any]], criterion: str,
                    verdicts: pd.DataFrame, monitor_spec: Any) -> str:
    parts = []
    promotions = store.promotions(monitor)
    annotations = store.annotations(monitor)
    deltas = store.metric_trend(monitor, "delta")
    for segment in focus:
        record = latest.get(segment, {})
        chosen = record.get("chosen_model")
        slug = _slug(segment) if segment else "all"
        seg_promotions = promotions[promotions["segment"] == segment] if len(promotions) \
            else promotions
        seg_notes = annotations[annotations["segment"].isna()
                                | (annotations["segment"] == segment)] if len(annotations) \
            else annotations
        if segment:
            parts.append(f"<h3>{_e(_segment_label(segment))}</h3>")
        trend = store.metric_trend(monitor, criterion, segment=segment)
        parts.append(page.figure(
            f"fig-criterion-{slug}",
            _plots.metric_trend_figure(trend, metric=criterion, chosen=chosen,
                                       alert_marks=alert_marks(store, monitor, segment),
                                       promotions=seg_promotions, annotations=seg_notes,
                                       label=criterion.upper()),
            f"{criterion.upper()} of every candidate, refitted night by night. Lower is better; "
            "only differences between candidates on the same night matter."))
        timeline = gap_timeline(verdicts, deltas, segment)
        margin = monitor_spec.family.margin if monitor_spec is not None else (
            plain_value(record.get("margin")))
        parts.append(page.figure(
            f"fig-gap-{slug}",
            _plots.criterion_gap_figure(timeline, criterion=criterion, margin=margin,
                                        chosen=chosen),
            "How far the chosen model's criterion is above the best candidate's, night by night."))
        fit = store.metric_trend(monitor, "adj_r_squared", segment=segment)
        parts.append(page.figure(
            f"fig-fit-{slug}",
            _plots.metric_trend_figure(fit, metric="adj_r_squared", chosen=chosen,
                                       promotions=seg_promotions, annotations=seg_notes,
                                       label="adjusted R²"),
            "Adjusted R² of every candidate: the share of the variation each one explains."))
        if chosen is not None:
            paths = store.coefficient_paths(monitor, model=chosen, segment=segment)
            if len(paths):
                parts.append(page.figure(
                    f"fig-coefficients-{slug}",
                    _plots.coefficient_paths_figure(paths, model=chosen),
                    f"Coefficients of the chosen model {chosen}, with their confidence bands."))
    return f'<section id="trends"><h2>The nights so far</h2>{"".join(parts)}</section>'


def _latest_night_section(page: _Page, checks: pd.DataFrame, focus: Sequence[str],
                          latest: Mapping[str, Mapping[str, Any]]) -> str:
    parts = []
    for segment in focus:
        chosen = latest.get(segment, {}).get("chosen_model")
        evidence = (night_evidence(checks, model=chosen, segment=segment)
                    if chosen is not None and len(checks) else None)
        slug = _slug(segment) if segment else "all"
        if segment:
            parts.append(f"<h3>{_e(_segment_label(segment))}</h3>")
        if evidence is None:
            parts.append('<p class="missing">No check rows were stored for the chosen model on '
                         "the latest night.</p>")
            continue
        parts.extend(_evidence_figures(page, evidence, slug))
    return (f'<section id="latest-night"><h2>The latest night up close</h2>'
            "<p>What the checks of the chosen model saw on the latest night, drawn from the "
            f"data they stored.</p>{''.join(parts)}</section>")


def _evidence_figures(page: _Page, evidence: NightEvidence, slug: str) -> list[str]:
    parts = []
    model = evidence.model
    if evidence.cusum is not None:
        trace = evidence.cusum
        parts.append(page.figure(
            f"fig-cusum-{slug}",
            _plots.cusum_figure(trace.path, at=trace.at, bound=trace.bound, lower=trace.lower,
                                upper=trace.upper, change_index=trace.change_index,
                                change_at=trace.change_at, scaled=trace.scaled,
                                subtitle=f"Running sum of the errors of {model}"),
            f"Cumulative sum of {model}'s errors in time order (cusum check: "
            f"{trace.verdict}, p {_p(trace.p_value)}). The vertical line is the estimated "
            "change (change-point estimate of the nightly run)."
            + ("" if trace.scaled else " Bounds are not drawn: the stored path does not hold "
               "the row of the largest sum, so its scale cannot be recovered.")))
    if evidence.sample is not None:
        sample = evidence.sample
        forecast = evidence.forecast_errors
        parts.append(page.figure(
            f"fig-errors-time-{slug}",
            _plots.errors_over_time_figure(
                sample.get("at", []), sample["residual"],
                forecast_at=forecast.get("at") if forecast else None,
                forecast_error=forecast.get("error") if forecast else None),
            "Errors of the latest night in time order (a stored sample of the rows)."))
        if sample.get("fitted"):
            parts.append(page.figure(
                f"fig-errors-fitted-{slug}",
                _plots.errors_by_fitted_figure(sample["fitted"], sample["residual"]),
                "Errors of the latest night against the predicted values (same sample)."))
    if evidence.bins is not None:
        bins = evidence.bins
        parts.append(page.figure(
            f"fig-bins-{slug}",
            _plots.error_bins_figure(bins["edges"], bins["baseline_shares"],
                                     bins["fresh_shares"]),
            "Share of errors in each of the baseline's residual bins: the baseline against the "
            "latest night (psi check)."))
    if evidence.top_rows:
        keys = [row.get("key") for row in evidence.top_rows]
        values = [float(row["cooks_distance"]) for row in evidence.top_rows]
        parts.append(page.figure(
            f"fig-influence-{slug}",
            _plots.influential_rows_figure(keys, values, cutoffs=evidence.cutoffs),
            "The rows with the largest Cook's distance on the latest night, by key "
            "(cooks_distance check)."))
    missing = evidence.missing()
    if missing:
        parts.append('<p class="missing">Not stored for this night: '
                     f"{_e('; '.join(missing))}.</p>")
    return parts


def _checks_section(checks: pd.DataFrame, latest: Mapping[str, Mapping[str, Any]],
                    focus: Sequence[str]) -> str:
    if not len(checks):
        return ('<section id="checks"><h2>Checks of the latest night</h2>'
                "<p>No check rows were stored on the latest night.</p></section>")
    references = _references()
    latest_run = int(checks["run_id"].iloc[-1])
    checks = checks[checks["run_id"] == latest_run]
    parts = []
    for segment in focus:
        chosen = latest.get(segment, {}).get("chosen_model")
        rows_here = checks[(checks["segment"] == segment) & (checks["model"] == chosen)]
        others = checks[(checks["segment"] == segment) & (checks["model"] != chosen)]
        rows = []
        for record in rows_here.itertuples(index=False):
            detail = record.detail if isinstance(record.detail, Mapping) else {}
            reference = references.get(record.check_name) or detail.get("reference") or "—"
            how = "all rows" if record.is_exact is not False else (
                f"sample of {_number(plain_value(record.sample_size))} rows")
            rows.append([_e(record.check_name), _tag(record.verdict),
                         _e(_number(record.statistic)), _e(_p(record.p_value)),
                         _e(_number(plain_value(record.rows))), _e(how), _e(reference)])
        heading = f"<h3>{_e(_segment_label(segment))} · {_e(chosen)}</h3>" if segment else \
            f"<h3>{_e(chosen)}</h3>"
        counts = others["verdict"].value_counts().to_dict() if len(others) else {}
        other_line = ", ".join(f"{n} {v}" for v, n in sorted(counts.items()))
        parts.append(heading + _table(
            ["check", "verdict", "statistic", "p-value", "rows", "computed on", "reference"],
            rows, numeric=[False, False, True, True, True, False, False])
            + (f"<p>Other candidates: {_e(other_line)}.</p>" if other_line else ""))
    return (f'<section id="checks"><h2>Checks of the latest night</h2>{"".join(parts)}'
            "</section>")


def _notes_section(store: Any, monitor: str) -> str:
    view = notes(store, monitor)
    if not view.rows:
        body = "<p>No promotion or note is recorded.</p>"
    else:
        rows = [[_e(_night(r["at"])), _e(r["kind"]),
                 _e(_segment_label(r["segment"]) if r["segment"] is not None else "all"),
                 _e(r["what"]) + (f"<br><small>{_e(r['reason'])}</small>" if r["reason"] else "")
                 + (f"<br><small>until {_e(_night(r['until']))}"
                    f"{', alerts silenced' if r['silences_alerts'] else ''}</small>"
                    if r["until"] is not None else ""),
                 _e(r["by"])] for r in view.records()]
        body = _table(["when", "kind", "segment", "what", "by"], rows)
    return f'<section id="notes"><h2>Promotions and notes</h2>{body}</section>'


def _cautions_section() -> str:
    items = "".join(f"<li>{_e(text)}</li>" for text in CAUTIONS)
    return (f'<section id="cautions"><h2>Reading this report with care</h2>'
            f'<ul class="cautions">{items}</ul></section>')
