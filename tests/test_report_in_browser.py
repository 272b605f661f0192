"""The HTML report rendered by a real browser: headless Chromium, no network features.

Chromium comes from the system packages (``.ci/run`` installs it).  Without it the
tests skip with the reason; with ``REGWARDEN_REQUIRE_SERVERS=1`` (set by CI) they
fail instead, as the server tests do (see tests/conftest.py).

The history is GENERATED TEST DATA (tests/generated_history.py).
"""

from __future__ import annotations

import datetime as dt
import html
import os
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from generated_history import HOSTILE, build_history
from matplotlib import image

from monitor.report import write_report
from storage.history import HistoryStore

NOW = dt.datetime(2025, 2, 1, 7, 0, tzinfo=dt.UTC)
WIDTH, HEIGHT = 1280, 2400


def chromium() -> str:
    for name in ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable"):
        found = shutil.which(name)
        if found:
            return found
    reason = ("the browser tests need headless Chromium (apt-get install chromium); "
              "see .ci/run")
    if os.environ.get("REGWARDEN_REQUIRE_SERVERS") == "1":
        pytest.fail(f"REGWARDEN_REQUIRE_SERVERS=1 but no Chromium was found: {reason}")
    pytest.skip(reason)


@pytest.fixture(scope="module")
def browser() -> str:
    """The Chromium executable; skips (or fails under CI) before any work when absent."""
    return chromium()


def browse(browser: str, page: Path, profile: Path, *extra: str
           ) -> subprocess.CompletedProcess[str]:
    """Run headless Chromium once on ``page`` with every network feature we can switch off."""
    command = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
               "--no-first-run", "--disable-background-networking",
               "--disable-component-update", "--disable-sync", "--disable-extensions",
               "--disable-default-apps", "--no-default-browser-check", "--mute-audio",
               "--host-resolver-rules=MAP * ~NOTFOUND", f"--user-data-dir={profile}",
               f"--window-size={WIDTH},{HEIGHT}", *extra, page.resolve().as_uri()]
    result = subprocess.run(command, capture_output=True, text=True, timeout=90, check=False)
    assert result.returncode == 0, f"chromium failed ({result.returncode}): {result.stderr[-800:]}"
    return result


@pytest.fixture(scope="module")
def report(tmp_path_factory: pytest.TempPathFactory, browser: str):
    folder = tmp_path_factory.mktemp("browser")
    with HistoryStore(f"sqlite:///{folder / 'history.sqlite'}") as store:
        store.upgrade()
        outline = build_history(store, nights=12, change_at=6)
        sentence = store.verdict_history(outline.monitor, with_detail=True)["detail"].iloc[-1][
            "summary"]
        alerts = store.alerts(outline.monitor, state="open")
        path = write_report(store, outline.monitor, folder / "report.html", now=NOW)
    return path, folder, sentence, alerts


def test_chromium_renders_the_report_with_the_verdict_alerts_and_every_figure(report, browser):
    path, folder, sentence, alerts = report
    dom = browse(browser, path, folder / "profile-dom", "--dump-dom").stdout
    assert dom.lstrip().lower().startswith("<!doctype html>\n<html")
    assert html.escape(sentence, quote=False) in dom
    for alert in alerts.itertuples():
        assert html.escape(alert.message, quote=False) in dom
        assert f"{alert.kind} · {alert.model}" in dom
    written = re.search(r'data-figures="([^"]*)"', path.read_text(encoding="utf-8")).group(1)
    expected = written.split()
    assert len(expected) == 9
    for figure_id in expected:
        block = re.search(rf'<figure class="chart" id="{figure_id}">(.*?)</figure>', dom,
                          flags=re.S)
        assert block is not None, f"figure {figure_id} missing from the rendered DOM"
        assert "<svg" in block.group(1) and "</svg>" in block.group(1)
    assert "<script" not in dom.lower()


def test_chromium_screenshot_of_the_report_is_not_blank(report, browser):
    path, folder, _sentence, _alerts = report
    shot = folder / "report.png"
    browse(browser, path, folder / "profile-shot", f"--screenshot={shot}")
    pixels = image.imread(shot)[:, :, :3]
    assert pixels.shape[:2] == (HEIGHT, WIDTH)
    # the masthead's dark green (#16302e) at the top left: the page's own CSS was applied
    np.testing.assert_allclose(pixels[12, 12], np.array([0x16, 0x30, 0x2E]) / 255, atol=0.02)
    body = pixels[300:]
    paper = np.array([0xFB, 0xFA, 0xF7]) / 255
    drawn = np.abs(body - paper).sum(axis=2) > 0.1
    assert drawn.mean() > 0.05, "the page below the masthead is (nearly) empty"
    codes = (body * 255).round().astype(np.int64) @ np.array([65536, 256, 1])
    assert len(np.unique(codes)) > 50  # many colours: text, tables, figures


def test_hostile_monitor_and_column_names_are_shown_as_text_not_run(tmp_path: Path,
                                                                    browser: str):
    with HistoryStore(f"sqlite:///{tmp_path / 'history.sqlite'}") as store:
        store.upgrade()
        outline = build_history(store, monitor=HOSTILE, nights=8, change_at=4, hostile=True)
        path = write_report(store, outline.monitor, tmp_path / "hostile.html", now=NOW)
    dom = browse(browser, path, tmp_path / "profile", "--dump-dom").stdout
    assert "<script" not in dom.lower()
    shown = html.escape(HOSTILE, quote=False)
    assert f'<h1 id="monitor-name">{shown}</h1>' in dom
    assert f"<title>regwarden report: {shown}</title>" in dom
    assert dom.count(shown) >= 5  # heading, title, coefficient panel, row key, alert, note
