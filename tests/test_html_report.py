"""The HTML report: one self-contained file, every section, every value escaped.

Histories are GENERATED TEST DATA (tests/generated_history.py) except in the last
test, which records real nightly runs (``run_monitor``) over invented rows.
"""

from __future__ import annotations

import datetime as dt
import html
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from generated_history import HOSTILE, build_history

from monitor.cli import main
from monitor.report import CAUTIONS, render_report
from storage.history import HistoryStore

NOW = dt.datetime(2025, 2, 1, 7, 0, tzinfo=dt.UTC)
EXPECTED_FIGURES = ("fig-criterion-all", "fig-gap-all", "fig-fit-all", "fig-coefficients-all",
                    "fig-cusum-all", "fig-errors-time-all", "fig-errors-fitted-all",
                    "fig-bins-all", "fig-influence-all")
SECTIONS = ("watch", "standing", "alerts", "since-when", "ranking", "trends", "latest-night",
            "checks", "notes", "cautions")


class Outline(HTMLParser):
    """Collects what the tests look at: elements, ids, attributes and figure contents."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.ids: list[str] = []
        self.attributes: list[tuple[str, str, str]] = []
        self.figures: dict[str, int] = {}
        self._figure: str | None = None
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for name, value in attrs:
            self.attributes.append((tag, name, value or ""))
            if name == "id":
                self.ids.append(value or "")
        if tag == "figure":
            self._figure = dict(attrs).get("id")
            self.figures[self._figure] = 0
        elif tag == "svg" and self._figure is not None:
            self.figures[self._figure] += 1

    def handle_endtag(self, tag):
        if tag == "figure":
            self._figure = None

    def handle_data(self, data):
        self.text.append(data)


def outline_of(page: str) -> Outline:
    parser = Outline()
    parser.feed(page)
    return parser


@pytest.fixture(scope="module")
def history(tmp_path_factory: pytest.TempPathFactory):
    folder = tmp_path_factory.mktemp("report")
    store = HistoryStore(f"sqlite:///{folder / 'history.sqlite'}")
    store.upgrade()
    outline = build_history(store, nights=14, change_at=8)
    page = render_report(store, outline.monitor, now=NOW)
    yield store, outline, page, folder
    store.close()


def test_report_has_every_section_in_order_and_says_alerts_are_evidence_not_proof(history):
    _store, _outline, page, _ = history
    parsed = outline_of(page)
    positions = [parsed.ids.index(section) for section in SECTIONS]
    assert positions == sorted(positions)
    text = " ".join(parsed.text)
    for caution in CAUTIONS:
        assert caution in text
    assert "statistical evidence, not proof" in text


def test_report_states_the_latest_verdict_sentence(history):
    store, outline, page, _ = history
    verdicts = store.verdict_history(outline.monitor, segment="", with_detail=True)
    sentence = verdicts["detail"].iloc[-1]["summary"]
    assert f'<p class="lede verdict">{html.escape(sentence)}</p>' in page


def test_report_shows_open_alerts_with_their_evidence_and_first_night(history):
    store, outline, page, _ = history
    alerts = store.alerts(outline.monitor, state="open")
    assert len(alerts) == 2
    cards = re.findall(r'<article class="alert".*?</article>', page, flags=re.S)
    assert len(cards) == 2
    for card, alert in zip(cards, alerts.sort_values("kind").itertuples(), strict=True):
        assert html.escape(alert.message) in card
        for key in alert.evidence:
            assert f"<dt>{html.escape(key)}</dt>" in card
    assert f"<dt>first seen</dt><dd>{outline.change_night:%Y-%m-%d}</dd>" in cards[0]


def test_report_inlines_every_figure_as_svg(history):
    _store, _outline, page, _ = history
    parsed = outline_of(page)
    assert tuple(parsed.figures) == EXPECTED_FIGURES
    assert all(count == 1 for count in parsed.figures.values())
    footer = re.search(r'data-figures="([^"]*)"', page).group(1).split()
    assert tuple(footer) == EXPECTED_FIGURES


def test_report_runs_no_script_and_loads_nothing(history):
    _store, _outline, page, _ = history
    parsed = outline_of(page)
    assert "script" not in parsed.tags and "iframe" not in parsed.tags
    assert "link" not in parsed.tags and "img" not in parsed.tags
    policy = [v for t, n, v in parsed.attributes if t == "meta" and n == "content"
              and "default-src" in v]
    assert policy and "script-src 'none'" in policy[0] and "default-src 'none'" in policy[0]
    references = [v for _t, n, v in parsed.attributes if n in ("src", "href", "xlink:href")]
    assert all(v.startswith("#") for v in references)
    assert not [n for _t, n, _v in parsed.attributes if n.startswith("on")]


def test_ranking_table_lists_the_latest_nights_candidates_best_first(history):
    store, outline, page, _ = history
    ranking = page[page.index('id="ranking"'):page.index('id="trends"')]
    delta = store.metric_trend(outline.monitor, "delta", start=outline.nights[-1])
    order = delta.sort_values("value")["model"].tolist()
    found = re.findall(r"<tr(?: class=\"is-chosen\")?><td>(\w+) ", ranking)
    assert found == order
    assert '<tr class="is-chosen"><td>mid <span class="tag">chosen</span>' in ranking


def test_hostile_names_and_messages_are_shown_as_text(tmp_path: Path):
    store = HistoryStore(f"sqlite:///{tmp_path / 'history.sqlite'}")
    store.upgrade()
    outline = build_history(store, monitor=HOSTILE, nights=10, change_at=6, hostile=True)
    page = render_report(store, outline.monitor, now=NOW)
    store.close()
    parsed = outline_of(page)
    assert "script" not in parsed.tags
    assert HOSTILE not in page
    escaped = html.escape(HOSTILE)
    assert f'<h1 id="monitor-name">{escaped}</h1>' in page
    assert page.count(escaped) >= 5  # title, heading, term panel, row key, alert message, note


def test_the_report_command_writes_the_file_with_the_specs_description(history, tmp_path: Path,
                                                                       capsys):
    _store, outline, _page, folder = history
    spec = folder / "spec.toml"
    spec.write_text(SPEC.format(monitor=outline.monitor), encoding="utf-8")
    target = tmp_path / "new-folder" / "cli.html"
    assert main(["report", str(spec), "--monitor", outline.monitor, "--out", str(target)]) == 0
    page = target.read_text(encoding="utf-8")
    assert page.startswith("<!DOCTYPE html>")
    assert "<code>y ~ temp * wind</code>" in page  # from the spec: what the monitor watches
    assert main(["report", str(spec), "--monitor", outline.monitor, "--out",
                 str(tmp_path / "r.pdf")]) == 2
    assert "should end in .html" in capsys.readouterr().err


SPEC = """
[history]
store = "sqlite:///history.sqlite"
[monitors.{monitor}]
description = "Invented monitor of the report tests"
[monitors.{monitor}.source]
kind = "parquet"
path = "rows"
time_column = "day"
[monitors.{monitor}.windows]
fresh = "30d"
[monitors.{monitor}.family]
response = "y"
chosen = "mid"
[monitors.{monitor}.family.candidates]
lean = "y ~ temp"
mid = "y ~ temp + wind"
full = "y ~ temp * wind"
"""


def test_report_of_real_nightly_runs(tmp_path: Path):
    """Nightly runs recorded by run_monitor (invented rows, two segments) make a full report."""
    from monitor.runs.run import run_monitor

    rng = np.random.default_rng(11)
    days = pd.date_range("2025-01-01", periods=90, freq="D", tz="UTC")
    frames = []
    for site in ("north", "south"):
        temp, wind = rng.normal(5, 6, len(days)), rng.gamma(2.0, 2.0, len(days))
        frames.append(pd.DataFrame({"day": days, "site": site, "temp": temp, "wind": wind,
                                    "y": 50 - 2 * temp + 0.8 * wind + rng.normal(0, 2, len(days))}))
    (tmp_path / "rows").mkdir()
    pd.concat(frames).to_parquet(tmp_path / "rows" / "part.parquet")
    spec = tmp_path / "spec.toml"
    spec.write_text(SPEC.format(monitor="heat-east").replace(
        'description = "Invented monitor of the report tests"',
        'description = "Invented monitor of the report tests"\nsegment_column = "site"'),
        encoding="utf-8")
    for day in pd.date_range("2025-03-01", periods=3, freq="D"):
        assert run_monitor(spec, "heat-east", day.date()).status == "completed"
    target = tmp_path / "report.html"
    assert main(["report", str(spec), "--monitor", "heat-east", "--out", str(target)]) == 0
    page = target.read_text(encoding="utf-8")
    parsed = outline_of(page)
    assert {"fig-criterion-north", "fig-gap-south", "fig-coefficients-north"} <= set(
        parsed.figures)
    assert page.count('<p class="lede verdict">') == 2
    assert "No check rows were stored" in page or "fig-cusum-north" in parsed.figures
