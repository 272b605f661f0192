"""History views: the same numbers as direct SQL on the history tables, in every format.

The history is GENERATED TEST DATA (tests/generated_history.py), written through the
store's public writer; the expected values come from hand-written SQL on the tables
(the README's public table contract), not from the store's query methods.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
from pathlib import Path

import pytest
import sqlalchemy as sa
from generated_history import build_history

from monitor.cli import main
from monitor.report import (
    alerts_view,
    check_outcomes,
    coefficient_paths,
    metric_trend,
    nights,
    notes,
    verdict_timeline,
    view_to_csv,
    view_to_json,
    what_changed,
)
from storage.history import HistoryStore

UTC = dt.UTC


@pytest.fixture(scope="module")
def history(tmp_path_factory: pytest.TempPathFactory):
    folder = tmp_path_factory.mktemp("views")
    store = HistoryStore(f"sqlite:///{folder / 'history.sqlite'}")
    store.upgrade()
    outline = build_history(store, segments=("", "north"))
    spec = folder / "spec.toml"
    spec.write_text(SPEC.format(monitor=outline.monitor), encoding="utf-8")
    yield store, outline, spec
    store.close()


SPEC = """
[history]
store = "sqlite:///history.sqlite"
[monitors.{monitor}]
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


def sql(store: HistoryStore, text: str, **parameters) -> list[tuple]:
    with store.engine.connect() as connection:
        return [tuple(row) for row in connection.execute(sa.text(text), parameters)]


def aware(value) -> dt.datetime:
    if isinstance(value, str):
        value = dt.datetime.fromisoformat(value)
    return value.replace(tzinfo=UTC) if value.tzinfo is None else value


def test_verdict_timeline_equals_sql_join_of_verdicts_and_the_chosen_models_delta(history):
    store, outline, _ = history
    expected = sql(store, """
        SELECT r.slot_at, v.segment, v.best_model, v.chosen_model, v.is_chosen_best, m.value
        FROM regwarden_verdicts v JOIN regwarden_runs r ON r.run_id = v.run_id
        LEFT JOIN regwarden_metrics m ON m.run_id = v.run_id AND m.segment = v.segment
             AND m.model = v.chosen_model AND m.metric = 'delta'
        WHERE r.monitor = :monitor AND r.status = 'completed'
        ORDER BY r.slot_at, v.segment""", monitor=outline.monitor)
    view = verdict_timeline(store, outline.monitor)
    got = [(r["night"], r["segment"], r["best"], r["chosen"], r["chosen_is_best"], r["gap"])
           for r in view.records()]
    assert len(got) == len(expected) == 2 * len(outline.nights)
    for row, want in zip(got, expected, strict=True):
        assert row[0] == aware(want[0])
        assert row[1:5] == (want[1], want[2], want[3], bool(want[4]))
        assert row[5] == want[5]  # the stored double, unchanged


def test_verdict_timeline_names_the_previous_best_and_how_far_it_fell_behind(history):
    store, outline, _ = history
    view = verdict_timeline(store, outline.monitor, segment="")
    records = view.records()
    changes = [r for r in records if r["best_before"] is not None]
    assert changes, "the generated history plants a change of the best candidate"
    for index, record in enumerate(records[1:], start=1):
        changed = record["best"] != records[index - 1]["best"]
        assert (record["best_before"] is not None) == changed
    for record in changes:
        (behind,) = sql(store, """SELECT value FROM regwarden_metrics WHERE run_id = :run
                        AND segment = '' AND model = :model AND metric = 'delta'""",
                        run=record["run_id"], model=record["best_before"])[0]
        assert record["best_before_behind_by"] == behind


@pytest.mark.parametrize("metric", ["aic", "adj_r_squared", "weight"])
def test_metric_trend_has_one_column_per_candidate_with_the_stored_values(history, metric):
    store, outline, _ = history
    expected = sql(store, """
        SELECT r.slot_at, m.segment, m.model, m.value FROM regwarden_metrics m
        JOIN regwarden_runs r ON r.run_id = m.run_id
        WHERE r.monitor = :monitor AND r.status = 'completed' AND m.metric = :metric""",
                   monitor=outline.monitor, metric=metric)
    view = metric_trend(store, outline.monitor, metric)
    assert view.columns == ("night", "segment", "full", "lean", "mid", "run_id")
    got = {}
    for record in view.records():
        for model in ("full", "lean", "mid"):
            got[(record["night"], record["segment"], model)] = record[model]
    assert got == {(aware(s), seg, model): value for s, seg, model, value in expected}


def test_check_outcomes_equal_sql_and_filter_by_check_model_and_segment(history):
    store, outline, _ = history
    expected = sql(store, """
        SELECT r.slot_at, c.segment, c.model, c.check_name, c.verdict, c.statistic, c.p_value
        FROM regwarden_checks c JOIN regwarden_runs r ON r.run_id = c.run_id
        WHERE r.monitor = :monitor AND c.check_name = 'cusum' AND c.model = 'mid'
          AND c.segment = 'north' ORDER BY r.slot_at""", monitor=outline.monitor)
    view = check_outcomes(store, outline.monitor, check="cusum", model="mid", segment="north")
    got = [(r["night"], r["segment"], r["model"], r["check"], r["verdict"], r["statistic"],
            r["p_value"]) for r in view.records()]
    assert got == [(aware(w[0]), *w[1:]) for w in expected]
    assert {r["verdict"] for r in view.records()} == {"pass", "fail"}
    everything = check_outcomes(store, outline.monitor)
    (count,) = sql(store, """SELECT COUNT(*) FROM regwarden_checks c JOIN regwarden_runs r
                   ON r.run_id = c.run_id WHERE r.monitor = :monitor""",
                   monitor=outline.monitor)[0]
    assert len(everything.rows) == count


def test_coefficient_paths_equal_sql(history):
    store, outline, _ = history
    expected = sql(store, """
        SELECT r.slot_at, c.estimate, c.std_error, c.ci_lower, c.ci_upper
        FROM regwarden_coefficients c JOIN regwarden_runs r ON r.run_id = c.run_id
        WHERE r.monitor = :monitor AND c.model = 'full' AND c.term = 'temp'
          AND c.segment = '' ORDER BY r.slot_at""", monitor=outline.monitor)
    view = coefficient_paths(store, outline.monitor, model="full", term="temp", segment="")
    got = [(r["night"], r["estimate"], r["std_error"], r["ci_lower"], r["ci_upper"])
           for r in view.records()]
    assert got == [(aware(w[0]), *w[1:]) for w in expected]


def test_alerts_view_gives_first_and_latest_night_from_the_run_ledger(history):
    store, outline, _ = history
    expected = sql(store, """
        SELECT a.kind, a.segment, a.state, f.slot_at, l.slot_at FROM regwarden_alerts a
        JOIN regwarden_runs f ON f.run_id = a.first_seen_run_id
        JOIN regwarden_runs l ON l.run_id = a.last_seen_run_id
        WHERE a.monitor = :monitor ORDER BY a.opened_at, a.alert_id""",
                   monitor=outline.monitor)
    view = alerts_view(store, outline.monitor)
    got = [(r["kind"], r["segment"], r["state"], r["first_night"], r["latest_night"])
           for r in view.records()]
    assert got == [(k, s, st, aware(f), aware(last)) for k, s, st, f, last in expected]
    assert got[0][3] == outline.change_night
    assert "not proof" in view.notes[0]


def test_nights_list_the_failed_night_with_its_step_and_reason(history):
    store, outline, _ = history
    view = nights(store, outline.monitor)
    failed = [r for r in view.records() if r["status"] == "failed"]
    assert [r["night"] for r in failed] == [outline.failed_night]
    assert failed[0]["failure"].startswith("source: the source table was empty")


def test_notes_list_the_promotion_and_the_annotation_in_time_order(history):
    store, outline, _ = history
    records = notes(store, outline.monitor).records()
    assert [r["kind"] for r in records] == ["promotion", "note"]
    assert records[0]["what"] == "mid made the chosen model"
    assert records[1]["until"] - records[1]["at"] == dt.timedelta(days=2)


def test_time_range_is_half_open_on_the_night(history):
    store, outline, _ = history
    start, end = outline.nights[4], outline.nights[9]
    view = verdict_timeline(store, outline.monitor, segment="", start=start, end=end)
    assert [r["night"] for r in view.records()] == list(outline.nights[4:9])


def test_csv_and_json_carry_every_number_at_full_precision(history):
    store, outline, _ = history
    view = metric_trend(store, outline.monitor, "aic", segment="north")
    parsed = list(csv.DictReader(io.StringIO(view_to_csv(view))))
    assert [float(row["mid"]) for row in parsed] == [r["mid"] for r in view.records()]
    assert parsed[0]["night"] == outline.nights[0].isoformat().replace("+00:00", "Z")
    data = json.loads(json.dumps(view_to_json(view)))
    assert [row["full"] for row in data["rows"]] == [r["full"] for r in view.records()]


def test_what_changed_compares_the_last_night_before_since_with_the_latest(history):
    store, outline, _ = history
    changes = what_changed(store, outline.monitor, since=outline.change_night, segment="",
                           top=50)
    before = max(n for n in outline.nights if n < outline.change_night)
    assert changes.reference_night == before
    assert changes.latest_night == outline.nights[-1]
    assert [a.first_night for a in changes.alerts if a.kind == "chosen_not_best"] == \
        [outline.change_night]
    assert changes.checks[0].check == "cusum" and changes.checks[0].verdict_steps == 2
    moved = {(m.model, m.term): m for m in changes.coefficients}
    for model, term, then, error in sql(store, """
            SELECT c.model, c.term, c.estimate, c.std_error FROM regwarden_coefficients c
            JOIN regwarden_runs r ON r.run_id = c.run_id
            WHERE r.monitor = :monitor AND r.slot_at = :night AND c.segment = ''""",
            monitor=outline.monitor, night=before.replace(tzinfo=None)):
        ((now,),) = sql(store, """SELECT c.estimate FROM regwarden_coefficients c
                        JOIN regwarden_runs r ON r.run_id = c.run_id WHERE r.monitor = :monitor
                        AND r.slot_at = :night AND c.segment = '' AND c.model = :model
                        AND c.term = :term""", monitor=outline.monitor,
                        night=outline.nights[-1].replace(tzinfo=None), model=model, term=term)
        assert moved[(model, term)].shift_in_std_errors == pytest.approx((now - then) / error,
                                                                         rel=1e-12)
    largest = changes.coefficients[0]
    assert largest.term == "temp" and largest.shift_in_std_errors < -5
    # planted: the 31st point of the thinned path, 12 h apart, rows 12 apart
    assert {(e.change_at, e.change_index) for e in changes.change_estimates} == \
        {((outline.nights[-1] - dt.timedelta(days=15)).isoformat(), 360)}


# ---------------------------------------------------------------------------- command line


def test_history_command_prints_a_table_by_default(history, capsys):
    _store, outline, spec = history
    assert main(["history", str(spec), "--monitor", outline.monitor, "--segment", ""]) == 0
    out = capsys.readouterr().out
    assert out.startswith("Which candidate led, night by night")
    assert "best_before" in out and "gap" in out


@pytest.mark.parametrize("view", ["verdicts", "metrics", "checks", "coefficients", "notes",
                                  "alerts", "nights"])
def test_history_command_json_equals_the_view(history, capsys, view):
    store, outline, spec = history
    assert main(["history", str(spec), "--monitor", outline.monitor, "--view", view,
                 "--format", "json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["view"] == view
    assert len(data["rows"]) > 0


def test_history_command_csv_with_metric_model_and_range(history, capsys):
    store, outline, spec = history
    assert main(["history", str(spec), "--monitor", outline.monitor, "--view", "metrics",
                 "--metric", "sigma", "--model", "lean", "--segment", "north", "--from",
                 outline.nights[2].date().isoformat(), "--until",
                 outline.nights[6].date().isoformat(), "--format", "csv"]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    expected = sql(store, """SELECT m.value FROM regwarden_metrics m JOIN regwarden_runs r
                   ON r.run_id = m.run_id WHERE r.monitor = :monitor AND m.metric = 'sigma'
                   AND m.model = 'lean' AND m.segment = 'north' AND r.slot_at >= :a
                   AND r.slot_at < :b ORDER BY r.slot_at""", monitor=outline.monitor,
                   a=outline.nights[2].replace(tzinfo=None),
                   b=outline.nights[6].replace(tzinfo=None))
    assert [float(r["lean"]) for r in rows] == [v for (v,) in expected]


def test_history_command_refuses_an_unknown_monitor_and_a_bad_date(history, capsys):
    _store, outline, spec = history
    assert main(["history", str(spec), "--monitor", "nope"]) == 2
    assert outline.monitor in capsys.readouterr().err
    assert main(["history", str(spec), "--monitor", outline.monitor, "--from", "yesterday"]) == 2
    assert "--from must be an ISO date" in capsys.readouterr().err


def test_changes_command_table_and_json(history, capsys):
    _store, outline, spec = history
    since = outline.change_night.date().isoformat()
    assert main(["changes", str(spec), "--monitor", outline.monitor, "--since", since]) == 0
    out = capsys.readouterr().out
    assert "First night each alert condition was seen" in out
    assert outline.change_night.strftime("%Y-%m-%d") in out
    assert "not proof" in out
    assert main(["changes", str(spec), "--monitor", outline.monitor, "--since", since,
                 "--format", "json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["change_estimates"] and data["checks"][0]["check"] == "cusum"


def test_history_command_writes_the_views_figure(history, tmp_path: Path):
    _store, outline, spec = history
    target = tmp_path / "gap.png"
    assert main(["history", str(spec), "--monitor", outline.monitor, "--segment", "",
                 "--plot", str(target)]) == 0
    assert target.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
