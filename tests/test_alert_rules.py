"""Alert rules: persistence, clearing, suppression, Benjamini–Hochberg, people's actions."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from monitor.errors import ConfigurationError
from monitor.runs.policy import AlertPolicy, WatchState, chart_settings, watch_night
from monitor.runs.rules import (
    AlertEvent,
    AlertRecord,
    Condition,
    Persistence,
    acknowledge,
    apply_rules,
    benjamini_hochberg,
    snooze,
)
from monitor.stats.sequential import ForecastReference, markov_chain_arl

START = datetime(2031, 3, 1, tzinfo=UTC)
PERSIST = {"sequential": Persistence(1, 1, 2), "window": Persistence(3, 5, 3),
           "data": Persistence(1, 1, 1), "schedule": Persistence(1, 1, 1)}


def _run(records, conditions, night, **options):
    return apply_rules(records, conditions, monitor="heat", run_id=f"r{night}",
                       run_at=START + timedelta(days=night), persistence=PERSIST, **options)


def _window(verdict, p=None, kind="assumption_normality", model="m1", segment=""):
    return Condition(kind, verdict, "window", model=model, segment=segment,
                     statistic_name="Jarque-Bera", statistic=9.0, p_value=p,
                     subject="Jarque-Bera")


def _drive(verdicts, make=_window):
    records, events = [], []
    for night, verdict in enumerate(verdicts, start=1):
        outcome = _run(records, [make(verdict)], night)
        records = list(outcome.records)
        events.append([e.event for e in outcome.events])
    return records, events


# ----------------------------------------------------------------------------- BH


def test_benjamini_hochberg_reproduces_the_methods_catalogue_example():
    # METHODS §11 [C: statsmodels multipletests fdr_bh and scipy false_discovery_control agree]
    p = (.001, .008, .039, .041, .042, .06, .074, .205, .212, .216)
    rejected, adjusted = benjamini_hochberg(p, 0.05)
    assert rejected == (True, True) + (False,) * 8
    np.testing.assert_allclose(adjusted, (.01, .04, .084, .084, .084, .1, .1057142857, .216,
                                          .216, .216), rtol=1e-9)


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_benjamini_hochberg_agrees_with_statsmodels_fdr_bh(seed):
    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(seed)
    p = np.concatenate([rng.uniform(size=25), rng.uniform(0, 0.01, size=5)])
    rng.shuffle(p)
    rejected, adjusted = benjamini_hochberg(p, 0.1)
    # statsmodels 0.15 multipletests: method must be named, its default is Holm-Sidak
    reference = multipletests(p, alpha=0.1, method="fdr_bh")
    assert list(rejected) == list(reference[0])
    np.testing.assert_allclose(adjusted, reference[1], rtol=1e-12)


def test_benjamini_hochberg_handles_an_empty_night_and_rejects_bad_p_values():
    assert benjamini_hochberg([], 0.05) == ((), ())
    with pytest.raises(ValueError):
        benjamini_hochberg([0.2, 1.5], 0.05)


# ----------------------------------------------------------------------------- persistence


def test_alert_opens_only_after_k_of_the_last_n_runs():
    _, events = _drive(["breached", "clean", "breached", "clean", "breached"])
    assert events == [[], [], [], [], ["opened"]]
    _, events = _drive(["breached", "clean", "clean", "clean", "breached", "breached"])
    # the first breach has left the 5-run window by run 6
    assert events == [[]] * 6


def test_alert_clears_only_after_m_clean_runs_in_a_row():
    verdicts = ["breached"] * 3 + ["clean", "clean", "watch", "clean", "clean", "clean"]
    records, events = _drive(verdicts)
    assert events[2] == ["opened"]
    assert events[5] == []  # a borderline run breaks the clean streak
    assert events[8] == ["resolved"]
    (record,) = records
    assert record.state == "resolved" and record.resolved_run == "r9"
    assert record.message.startswith("Resolved in model 'm1'")


def test_a_borderline_value_does_not_flap():
    """Once open, a value hovering around its limit neither resolves nor reopens every night."""
    _, events = _drive(["breached"] * 3 + ["clean", "breached"] * 8)
    assert [e for night in events for e in night] == ["opened"]


def test_reopening_starts_a_new_episode_with_its_own_since_run():
    verdicts = ["breached"] * 3 + ["clean"] * 3 + ["breached"] * 3
    records, events = _drive(verdicts)
    assert events[2] == ["opened"] and events[5] == ["resolved"] and events[8] == ["opened"]
    (record,) = records
    assert record.episode == 2 and record.alert_id == "heat/-/m1/assumption_normality#2"
    assert record.evidence.since_run == "r7" and record.opened_run == "r9"


def test_evidence_and_message_name_the_statistic_and_the_first_breached_run():
    records, _ = _drive(["breached", "breached", "breached"],
                        make=lambda v: _window(v, p=1e-6))
    (record,) = records
    assert record.severity == "warning"  # window checks are capped at warning
    assert record.evidence.statistic == 9.0 and record.evidence.p_value == 1e-6
    assert record.evidence.adjusted_p_value == pytest.approx(1e-6)
    assert record.evidence.since_run == "r1"
    assert record.message == (
        "Warning in model 'm1': the residuals no longer look normally distributed "
        "(Jarque-Bera 9, p = 1.00e-06, adjusted p = 1.00e-06), since run r1.")


def test_window_checks_are_capped_at_warning_but_sequential_ones_are_not():
    sequential = Condition("fit_degraded", "breached", "sequential", model="m1",
                           statistic_name="forecast error size CUSUM", statistic=25.0,
                           threshold=19.4)
    window = Condition("fit_degraded", "breached", "window", model="m2", severity="critical")
    outcome = _run([], [sequential], 1)
    assert outcome.events[0].record.severity == "critical"
    records = []
    for night in range(1, 4):
        records = list(_run(records, [window], night).records)
    assert records[0].severity == "warning"


# ----------------------------------------------------------------------------- suppression, BH


def test_a_data_problem_suppresses_model_quality_findings_of_the_same_run():
    data = Condition("data_too_many_dropped_rows", "breached", "data", statistic=0.4,
                     threshold=0.1, statistic_name="share of rows dropped")
    model = Condition("fit_degraded", "breached", "sequential", model="m1")
    outcome = _run([], [data, model], 1)
    assert [e.record.key.kind for e in outcome.events] == ["data_too_many_dropped_rows"]
    assert outcome.suppressed == (model,)
    # the suppressed run counts neither way: a later breach opens at once (1 of 1)
    outcome = _run(list(outcome.records), [model], 2)
    assert [e.event for e in outcome.events] == ["opened"]


def test_a_segment_data_problem_suppresses_only_that_segment():
    data = Condition("data_unseen_levels", "breached", "data", segment="north")
    north = Condition("fit_degraded", "breached", "sequential", model="m1", segment="north")
    south = Condition("fit_degraded", "breached", "sequential", model="m1", segment="south")
    outcome = _run([], [data, north, south], 1)
    assert sorted(e.record.key.segment + e.record.key.kind for e in outcome.events) == \
        ["northdata_unseen_levels", "southfit_degraded"]


def test_benjamini_hochberg_across_the_night_downgrades_chance_findings():
    # ten checks at p = .02 each: BH at 0.05 needs p_(10) <= .05 -> all rejected;
    # one check at .02 among nine at .9: needs p_(1) <= .005 -> downgraded to watch
    many = [_window("breached", 0.02, model=f"m{i}") for i in range(10)]
    outcome = _run([], many, 1, false_discovery_rate=0.05)
    assert all(c.verdict == "breached" for c, _ in outcome.adjusted_p_values)
    lonely = [_window("breached", 0.02, model="m0")] + \
        [_window("clean", 0.9, model=f"m{i}") for i in range(1, 10)]
    outcome = _run([], lonely, 1, false_discovery_rate=0.05)
    assert outcome.adjusted_p_values[0][0].verdict == "watch"
    assert outcome.adjusted_p_values[0][1] == pytest.approx(0.2)
    assert outcome.records[0].recent == "W"


# ----------------------------------------------------------------------------- people


def _opened_record():
    outcome = _run([], [Condition("fit_degraded", "breached", "sequential", model="m1")], 1)
    return list(outcome.records)


def test_acknowledged_alert_stays_quiet_until_it_resolves():
    records = [acknowledge(_opened_record()[0], by="ana")]
    condition = Condition("fit_degraded", "breached", "sequential", model="m1")
    outcome = _run(records, [condition], 2)
    assert outcome.events == () and outcome.records[0].state == "acknowledged"
    clean = Condition("fit_degraded", "clean", "sequential", model="m1")
    outcome = _run(list(outcome.records), [clean], 3)
    outcome = _run(list(outcome.records), [clean], 4)
    assert [e.event for e in outcome.events] == ["resolved"]


def test_snoozed_alert_returns_as_a_reminder_when_the_snooze_ends_and_it_still_holds():
    record = _opened_record()[0]
    until = START + timedelta(days=3, hours=12)
    records = [snooze(record, until=until, now=START + timedelta(days=1))]
    condition = Condition("fit_degraded", "breached", "sequential", model="m1")
    outcome = _run(records, [condition], 2)
    assert outcome.events == () and outcome.records[0].state == "snoozed"
    outcome = _run(list(outcome.records), [condition], 3)
    assert outcome.events == ()
    outcome = _run(list(outcome.records), [condition], 4)
    assert [e.event for e in outcome.events] == ["reminder"]
    assert outcome.records[0].state == "open"


def test_people_cannot_act_on_inactive_alerts_or_snooze_into_the_past():
    quiet = AlertRecord(_opened_record()[0].key)
    with pytest.raises(ConfigurationError, match="not active"):
        acknowledge(quiet, by="ana")
    record = _opened_record()[0]
    with pytest.raises(ConfigurationError, match="not in the future"):
        snooze(record, until=START, now=START + timedelta(days=1))
    with pytest.raises(ConfigurationError, match="time zone"):
        snooze(record, until=datetime(2040, 1, 1), now=START)


def test_unknown_kind_and_bad_persistence_are_configuration_errors():
    with pytest.raises(ConfigurationError, match="unknown alert kind 'fit_bad'"):
        Condition("fit_bad", "breached")
    with pytest.raises(ConfigurationError, match="open_after_runs"):
        Persistence(4, 3, 1)


def test_records_events_conditions_and_policy_round_trip_through_dicts():
    records, _ = _drive(["breached"] * 3 + ["clean"] * 3, make=lambda v: _window(v, p=1e-5))
    for record in records:
        assert AlertRecord.from_dict(record.to_dict()) == record
    snoozed = snooze(_opened_record()[0], until=START + timedelta(days=9), now=START)
    assert AlertRecord.from_dict(snoozed.to_dict()) == snoozed
    event = AlertEvent("opened", snoozed)
    assert AlertEvent.from_dict(event.to_dict()) == event
    condition = _window("breached", 0.01)
    assert Condition.from_dict(condition.to_dict()) == condition
    policy = AlertPolicy(false_discovery_rate=0.01, window_persistence=Persistence(2, 4, 3))
    assert AlertPolicy.from_dict(policy.to_dict()) == policy


def test_newer_record_versions_are_refused():
    data = _opened_record()[0].to_dict()
    data["record_version"] = 99
    with pytest.raises(ConfigurationError, match="newer"):
        AlertRecord.from_dict(data)


# ----------------------------------------------------------------------------- policy


def test_chart_budget_shares_add_up_to_the_target_false_alarm_rate():
    policy = AlertPolicy()
    settings = chart_settings(policy, ["x1", "x2"], ["x1:x2"])
    from scipy import stats

    rate = 0.0
    for name, setting in settings.items():
        cdf = stats.chi2(1).cdf if name == "scale" else None
        one = markov_chain_arl(setting.allowance, setting.threshold, cdf)
        rate += (2.0 if setting.two_sided else 1.0) / one
    assert 1.0 / rate == pytest.approx(policy.nights_between_false_alarms, rel=5e-3)


def test_watch_night_raises_a_critical_alert_when_forecasts_break(rng):
    n = 90
    X = np.column_stack([np.ones(n + 40), rng.standard_normal(n + 40)])
    y = X @ np.array([1.0, 2.0]) + rng.standard_normal(n + 40)
    y[n:] += 3.0  # forecasts now run 3 sigma low
    state = WatchState(ForecastReference.from_rows(X[:n], y[:n]))
    records: list[AlertRecord] = []
    policy = AlertPolicy()
    opened_at = None
    for night in range(1, 41):
        row = slice(n + night - 1, n + night)
        state, conditions = watch_night(state, X[row], y[row], policy=policy, model="m1",
                                        column_labels=("Intercept", "x"), chosen_columns=(0, 1),
                                        watched_columns=(1,))
        outcome = apply_rules(records, conditions, monitor="heat", run_id=f"r{night}",
                              run_at=START + timedelta(days=night),
                              persistence=policy.persistence_by_method())
        records = list(outcome.records)
        if any(e.event == "opened" and e.record.key.kind == "fit_degraded"
               for e in outcome.events):
            opened_at = night
            break
    assert opened_at is not None and opened_at <= 6
    degraded = next(r for r in records if r.key.kind == "fit_degraded")
    assert degraded.severity == "critical" and degraded.message.startswith("Critical in model")
    level = next(c for c in conditions if c.statistic_name == "forecast bias CUSUM")
    assert level.detail == "forecasts run low"
    assert WatchState.from_dict(state.to_dict()) == state
