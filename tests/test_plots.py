"""Figures draw exactly the stored history: the plotted arrays are read back and compared.

The history is GENERATED TEST DATA (tests/generated_history.py) written through the
store's public writer; the expected arrays come from direct SQL on the history tables
(or from the stored check ``detail``), never from the code under test.
"""

from __future__ import annotations

import datetime as dt
import html
import io
from pathlib import Path

import matplotlib
import matplotlib.dates as mdates
import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from generated_history import HOSTILE, build_history
from matplotlib.collections import PolyCollection

from monitor.report import _plots
from monitor.report._evidence import night_evidence
from monitor.report._figures import alert_marks, gap_timeline
from monitor.report._plots import artist_by_gid
from storage.history import HistoryStore

UTC = dt.UTC


@pytest.fixture(scope="module")
def history(tmp_path_factory: pytest.TempPathFactory):
    folder = tmp_path_factory.mktemp("plots")
    store = HistoryStore(f"sqlite:///{folder / 'history.sqlite'}")
    store.upgrade()
    outline = build_history(store, nights=16, change_at=9)
    yield store, outline
    store.close()


def days(instants) -> np.ndarray:
    """Matplotlib date numbers of aware or naive-UTC instants (the test's own conversion)."""
    return np.array([mdates.date2num(i.replace(tzinfo=None) if i.tzinfo is None
                                     else i.astimezone(UTC).replace(tzinfo=None))
                     for i in instants])


def sql(store: HistoryStore, text: str, **parameters) -> list[tuple]:
    with store.engine.connect() as connection:
        return [tuple(row) for row in connection.execute(sa.text(text), parameters)]


def xy(figure, gid: str) -> tuple[np.ndarray, np.ndarray]:
    line = artist_by_gid(figure, gid)
    return np.asarray(line.get_xdata(), dtype=float), np.asarray(line.get_ydata(), dtype=float)


def test_metric_trend_draws_every_candidates_stored_values_and_the_alert_nights(history):
    store, outline = history
    trend = store.metric_trend(outline.monitor, "aic", segment="")
    figure = _plots.metric_trend_figure(
        trend, metric="aic", chosen="mid", alert_marks=alert_marks(store, outline.monitor, ""),
        promotions=store.promotions(outline.monitor),
        annotations=store.annotations(outline.monitor))
    for model in ("lean", "mid", "full"):
        rows = sql(store, """SELECT r.slot_at, m.value FROM regwarden_metrics m
                   JOIN regwarden_runs r ON r.run_id = m.run_id WHERE r.monitor = :monitor
                   AND m.metric = 'aic' AND m.model = :model ORDER BY r.slot_at""",
                   monitor=outline.monitor, model=model)
        x, y = xy(figure, f"trend:{model}")
        np.testing.assert_array_equal(x, days([dt.datetime.fromisoformat(str(s))
                                               for s, _ in rows]))
        np.testing.assert_array_equal(y, [v for _, v in rows])
    assert artist_by_gid(figure, "trend:mid").get_linewidth() > \
        artist_by_gid(figure, "trend:lean").get_linewidth()
    seen = sql(store, """SELECT DISTINCT r.slot_at FROM regwarden_alert_events e
               JOIN regwarden_runs r ON r.run_id = e.run_id ORDER BY r.slot_at""")
    x, _ = xy(figure, "alerts")
    np.testing.assert_array_equal(x, days([dt.datetime.fromisoformat(str(s)) for (s,) in seen]))
    assert x[0] == days([outline.change_night])[0]
    (promoted,) = sql(store, "SELECT promoted_at FROM regwarden_promotions")[0]
    promotion_x = artist_by_gid(figure, "promotion:0").get_xdata()
    assert promotion_x[0] == days([dt.datetime.fromisoformat(str(promoted))])[0]
    span = artist_by_gid(figure, "note:0")
    starts, ends = sql(store, "SELECT starts_at, ends_at FROM regwarden_annotations")[0]
    if hasattr(span, "get_width"):  # Rectangle (matplotlib >= 3.9)
        corners = np.array([span.get_x(), span.get_x() + span.get_width()])
    else:  # Polygon (matplotlib 3.8)
        corners = np.asarray(span.get_xy())[:, 0]
    assert corners.min() == days([dt.datetime.fromisoformat(str(starts))])[0]
    assert corners.max() == days([dt.datetime.fromisoformat(str(ends))])[0]


def test_criterion_gap_draws_the_chosen_models_delta_and_the_margin(history):
    store, outline = history
    timeline = gap_timeline(store.verdict_history(outline.monitor),
                            store.metric_trend(outline.monitor, "delta"), "")
    figure = _plots.criterion_gap_figure(timeline, criterion="aic", margin=2.0, chosen="mid")
    rows = sql(store, """SELECT r.slot_at, m.value, v.best_model FROM regwarden_verdicts v
               JOIN regwarden_runs r ON r.run_id = v.run_id JOIN regwarden_metrics m
               ON m.run_id = v.run_id AND m.model = v.chosen_model AND m.metric = 'delta'
               AND m.segment = v.segment ORDER BY r.slot_at""")
    x, y = xy(figure, "gap")
    np.testing.assert_array_equal(x, days([dt.datetime.fromisoformat(str(s)) for s, _, _ in rows]))
    np.testing.assert_array_equal(y, [v for _, v, _ in rows])
    _, leading = xy(figure, "gap-chosen-leads")
    np.testing.assert_array_equal(leading, [v for _, v, best in rows if best == "mid"])
    assert list(artist_by_gid(figure, "margin").get_ydata()) == [2.0, 2.0]
    changes = [i for i in range(1, len(rows)) if rows[i][2] != rows[i - 1][2]]
    labels = [artist_by_gid(figure, f"best-change:{k}").get_text() for k in range(len(changes))]
    assert labels == [f"{rows[i][2]} leads" for i in changes]


def test_coefficient_paths_draw_estimates_and_bands_as_stored(history):
    store, outline = history
    paths = store.coefficient_paths(outline.monitor, model="full", segment="")
    figure = _plots.coefficient_paths_figure(paths, model="full")
    assert len(figure.axes) == 4
    for term in outline.models["full"]:
        rows = sql(store, """SELECT r.slot_at, c.estimate, c.ci_lower, c.ci_upper
                   FROM regwarden_coefficients c JOIN regwarden_runs r ON r.run_id = c.run_id
                   WHERE c.model = 'full' AND c.term = :term ORDER BY r.slot_at""", term=term)
        when = days([dt.datetime.fromisoformat(str(r[0])) for r in rows])
        for gid, column in (("estimate", 1), ("ci_lower", 2), ("ci_upper", 3)):
            x, y = xy(figure, f"{gid}:{term}")
            np.testing.assert_array_equal(x, when)
            np.testing.assert_array_equal(y, [r[column] for r in rows])
        band = artist_by_gid(figure, f"band:{term}")
        assert isinstance(band, PolyCollection)
        vertices = band.get_paths()[0].vertices
        inside = {(float(vx), float(vy)) for vx, vy in vertices}
        for (_stamp, _estimate, low, high), day in zip(rows, when, strict=True):
            assert (day, low) in inside and (day, high) in inside


def test_cusum_figure_draws_the_stored_path_on_the_statistics_scale_with_the_change(history):
    store, outline = history
    checks = store.check_trend(outline.monitor, "cusum", model="mid", segment="",
                               with_detail=True)
    detail, statistic = checks["detail"].iloc[-1], checks["statistic"].iloc[-1]
    trace = night_evidence(checks, model="mid", segment="").cusum
    figure = _plots.cusum_figure(trace.path, at=trace.at, bound=trace.bound,
                                 change_index=trace.change_index, change_at=trace.change_at)
    change = detail["change"]
    raw = np.array(change["path_values"])
    largest = change["path_rows"].index(detail["largest_at_row"])
    at = [dt.datetime.fromisoformat(a) for a in change["path_keys"]]
    x, y = xy(figure, "cusum-path")
    np.testing.assert_array_equal(x, days(at))
    # the stored statistic is max|S_k| / sqrt(n sigma^2): the same division puts the path on
    # the statistic's scale, where the path's largest value IS the statistic
    np.testing.assert_allclose(y, raw / (abs(raw[largest]) / statistic), rtol=1e-15)
    assert abs(y[largest]) == pytest.approx(statistic, rel=1e-15)
    np.testing.assert_array_equal(xy(figure, "bound-upper")[1], np.full(len(at), 1.36))
    np.testing.assert_array_equal(xy(figure, "bound-lower")[1], np.full(len(at), -1.36))
    line = artist_by_gid(figure, "change").get_xdata()[0]
    assert line == days([dt.datetime.fromisoformat(change["key"])])[0]


def test_cusum_figure_without_times_uses_row_positions_and_the_change_index():
    figure = _plots.cusum_figure([0.1, -0.2, 0.4, 1.9], lower=[-1, -1.1, -1.2, -1.3],
                                 upper=[1, 1.1, 1.2, 1.3], change_index=2)
    x, y = xy(figure, "cusum-path")
    np.testing.assert_array_equal(x, [1, 2, 3, 4])
    np.testing.assert_array_equal(xy(figure, "bound-lower")[1], [-1, -1.1, -1.2, -1.3])
    assert artist_by_gid(figure, "change").get_xdata()[0] == 3.0


def test_night_views_draw_the_stored_sample_bins_and_top_rows(history):
    store, outline = history
    checks = store.check_trend(outline.monitor, None, model="mid", segment="",
                               with_detail=True)
    last = checks[checks["run_id"] == checks["run_id"].max()].set_index("check_name")
    sample = last.loc["jarque_bera", "detail"]["sample"]
    forecast = last.loc["jarque_bera", "detail"]["forecast_errors"]
    figure = _plots.errors_over_time_figure(sample["at"], sample["residual"],
                                            forecast_at=forecast["at"],
                                            forecast_error=forecast["error"])
    x, y = xy(figure, "residuals")
    np.testing.assert_array_equal(x, days([dt.datetime.fromisoformat(a) for a in sample["at"]]))
    np.testing.assert_array_equal(y, sample["residual"])
    np.testing.assert_array_equal(xy(figure, "forecast-errors")[1], forecast["error"])
    figure = _plots.errors_by_fitted_figure(sample["fitted"], sample["residual"])
    x, y = xy(figure, "errors-by-fitted")
    np.testing.assert_array_equal(x, sample["fitted"])
    np.testing.assert_array_equal(y, sample["residual"])
    bins = last.loc["psi", "detail"]
    figure = _plots.error_bins_figure(bins["edges"], bins["baseline_shares"],
                                      bins["fresh_shares"])
    x, y = xy(figure, "baseline-share")
    np.testing.assert_array_equal(x, bins["baseline_shares"])
    np.testing.assert_array_equal(y, np.arange(10))
    np.testing.assert_array_equal(xy(figure, "fresh-share")[0], bins["fresh_shares"])
    tick_labels = [t.get_text() for t in figure.axes[0].get_yticklabels()]
    assert tick_labels[0] == "below -3.2" and tick_labels[1] == "-3.2 to -2.4"
    assert tick_labels[-1] == "3.2 and above"
    top = last.loc["cooks_distance", "detail"]["top_rows"]
    figure = _plots.influential_rows_figure([r["key"] for r in top],
                                            [r["cooks_distance"] for r in top],
                                            cutoffs={"4/n": 4 / 718})
    widths = [artist_by_gid(figure, f"influence:{i}").get_width() for i in range(len(top))]
    assert widths == [r["cooks_distance"] for r in top]
    assert [t.get_text() for t in figure.axes[0].get_yticklabels()] == [r["key"] for r in top]
    assert artist_by_gid(figure, "cutoff:4/n").get_xdata()[0] == 4 / 718


@pytest.mark.parametrize("name", [HOSTILE, "cost $x$ and $y$", "_hidden", r"a\$b"])
def test_names_from_data_are_drawn_literally(name):
    """No math mode from dollars, no hidden legend entries, markup escaped in SVG text."""
    figure = _plots.metric_trend_figure(
        pd.DataFrame({"slot_at": [dt.datetime(2025, 1, 1, tzinfo=UTC)], "model": [name],
                      "value": [1.0]}), metric="aic")
    buffer = io.StringIO()
    with matplotlib.rc_context({"svg.fonttype": "none"}):
        figure.savefig(buffer, format="svg")  # mathtext would raise on "$x$ and $y$"
    svg = buffer.getvalue()
    legend = [t.get_text() for t in figure.axes[0].get_legend().get_texts()]
    assert legend == [_plots.safe_text(name)]
    assert html.escape(name, quote=False) in svg
    assert "<script" not in svg


@pytest.mark.parametrize("suffix", ["png", "svg"])
def test_figures_are_written_as_png_or_svg(history, tmp_path: Path, suffix: str):
    store, outline = history
    figure = _plots.metric_trend_figure(store.metric_trend(outline.monitor, "bic"),
                                        metric="bic", chosen="mid")
    target = tmp_path / f"trend.{suffix}"
    figure.savefig(target, format=suffix)
    head = target.read_bytes()[:64]
    assert head.startswith(b"\x89PNG") if suffix == "png" else b"<svg" in target.read_bytes()
