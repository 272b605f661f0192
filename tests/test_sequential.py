"""Page CUSUM, its ARL calibration, and the normal scores of one-step forecast errors."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from monitor.stats.sequential import (
    CusumSettings,
    CusumState,
    ForecastReference,
    cusum_run,
    cusum_step,
    markov_chain_arl,
    score_rows,
    siegmund_arl,
    threshold_for_arl,
    two_sided_arl,
)


def _simulated_arl(rng: np.random.Generator, allowance: float, threshold: float,
                   draw, replicates: int = 3000, limit: int = 5000) -> float:
    """Mean run length of one-sided charts run side by side (vectorised over replicates)."""
    sums = np.zeros(replicates)
    lengths = np.zeros(replicates)
    alive = np.ones(replicates, dtype=bool)
    for night in range(1, limit + 1):
        sums = np.maximum(0.0, sums + draw(rng, replicates) - allowance)
        hit = alive & (sums > threshold)
        lengths[hit] = night
        alive &= ~hit
        if not alive.any():
            break
    lengths[alive] = limit
    return float(lengths.mean())


# ----------------------------------------------------------------------------- ARL


def test_markov_chain_arl_matches_the_methods_catalogue_table():
    # METHODS §11 [C: f_drift.py, Markov chain with 400 states]: k=.5 h=4 -> 335, h=5 -> 931
    assert markov_chain_arl(0.5, 4.0) == pytest.approx(335.4, abs=0.6)
    assert markov_chain_arl(0.5, 5.0) == pytest.approx(931, abs=1.5)
    # two-sided: 1/ARL = 1/ARL+ + 1/ARL- -> 168 and 465 (same table)
    assert two_sided_arl(markov_chain_arl(0.5, 4.0), markov_chain_arl(0.5, 4.0)) == \
        pytest.approx(168, abs=0.5)
    # out of control, shift 1 sigma: 8.4 and 10.4 (same table)
    shifted = stats.norm(loc=1.0).cdf
    assert markov_chain_arl(0.5, 4.0, shifted) == pytest.approx(8.4, abs=0.05)
    assert markov_chain_arl(0.5, 5.0, shifted) == pytest.approx(10.4, abs=0.05)


def test_siegmund_approximation_matches_the_methods_catalogue():
    # METHODS §11 [C]: Siegmund's approximation gives 338 and 938
    assert siegmund_arl(0.5, 4.0) == pytest.approx(338, abs=0.6)
    assert siegmund_arl(0.5, 5.0) == pytest.approx(938, abs=0.6)
    # zero drift: b squared
    assert siegmund_arl(0.5, 4.0, shift=0.5) == pytest.approx((4 + 1.166) ** 2)


def test_threshold_for_arl_inverts_the_markov_chain():
    h = threshold_for_arl(335.36, 0.5)
    assert h == pytest.approx(4.0, abs=1e-3)
    h_two = threshold_for_arl(465.4, 0.5, two_sided=True)
    assert h_two == pytest.approx(5.0, abs=2e-3)


def test_chi_square_chart_arl_agrees_with_simulation(rng):
    """A chart on squared normal scores (the scale signal): Markov chain vs simulation."""
    allowance, threshold = 2 * math.log(2), 9.0
    predicted = markov_chain_arl(allowance, threshold, stats.chi2(1).cdf)
    simulated = _simulated_arl(rng, allowance, threshold,
                               lambda g, n: g.standard_normal(n) ** 2)
    # 3000 run lengths: standard error about ARL/sqrt(3000) = 1.8 %
    assert simulated == pytest.approx(predicted, rel=0.07)


# ----------------------------------------------------------------------------- CUSUM


def test_cusum_recursion_by_hand():
    settings = CusumSettings(allowance=0.5, threshold=2.0)
    state, steps = cusum_run([1.0, 1.5, -0.2, 2.0, -4.0], settings)
    # S+ : 0.5, 1.5, 0.8, 2.3 (alarm), 0 ; S- : 0, 0, 0, 0, 3.5 (alarm)
    assert [round(s.statistic, 10) for s in steps] == [0.5, 1.5, 0.8, 2.3, 3.0]
    assert [s.is_alarm for s in steps] == [False, False, False, True, True]
    assert steps[3].since == 0 and steps[3].direction == "up"
    # the ceiling (1.5 h = 3) caps the downward sum at 3.0
    assert steps[4].direction == "down" and state.lower == 3.0 and state.lower_since == 4


def test_one_sided_chart_ignores_downward_moves():
    state, steps = cusum_run([-5.0, -5.0], CusumSettings(0.5, 2.0, two_sided=False))
    assert state.lower == 0.0 and not any(s.is_alarm for s in steps)


def test_burn_in_standardizes_by_the_early_mean_and_deviation():
    settings = CusumSettings(0.5, 3.0, burn_in_nights=4)
    state, steps = cusum_run([10.0, 12.0, 14.0, 16.0, 13.0 + 2 * 2.5819888974716], settings)
    assert all(s.is_burning_in for s in steps[:4])
    # mean 13, sd 2.58198...: the fifth value is +2 sd, so S+ = 2 - 0.5
    assert steps[4].standardized == pytest.approx(2.0)
    assert state.upper == pytest.approx(1.5)


def test_state_round_trips_through_a_dict():
    state, _ = cusum_run([0.3, 2.0, -1.0], CusumSettings(0.5, 4.0, burn_in_nights=2))
    assert CusumState.from_dict(state.to_dict()) == state
    settings = CusumSettings(0.25, 9.5, False, 3, 2.0)
    assert CusumSettings.from_dict(settings.to_dict()) == settings


def test_non_finite_values_leave_the_chart_unchanged():
    settings = CusumSettings(0.5, 4.0)
    state, _ = cusum_step(CusumState(upper=1.0, upper_since=0, observations=1), float("nan"),
                          settings)
    assert state.upper == 1.0 and state.observations == 1


def test_settings_reject_nonsense():
    with pytest.raises(ValueError, match="threshold"):
        CusumSettings(0.5, 0.0)
    with pytest.raises(ValueError, match="burn_in_nights"):
        CusumSettings(0.5, 4.0, burn_in_nights=1)


# ----------------------------------------------------------------------------- scores


def _design(rng, n):
    X = np.column_stack([np.ones(n), rng.standard_normal(n), rng.exponential(1.0, n)])
    y = X @ np.array([2.0, 1.0, -0.5]) + rng.standard_normal(n) * 0.7
    return X, y


def test_recursive_scores_equal_statsmodels_standardized_recursive_residuals_mapped_by_t(rng):
    """q = Phi^-1(F_t(w / s)), with w the recursive residuals of statsmodels."""
    from statsmodels.regression.linear_model import OLS
    from statsmodels.stats.diagnostic import recursive_olsresiduals

    X, y = _design(rng, 60)
    start = 20
    reference = ForecastReference.from_rows(X[:start], y[:start])
    scores, after = score_rows(reference, X[start:], y[start:], [0, 1, 2])
    assert after.n_rows == 60
    # statsmodels 0.15 recursive_olsresiduals: rresid_scaled are w_r (N(0, sigma^2))
    # statsmodels 0.15: element 4 (rresid_scaled) holds w_r, N(0, sigma^2), at index r
    w = recursive_olsresiduals(OLS(y, X).fit(), skip=3)[4][start:]
    expected = []
    for r, w_r in enumerate(w, start=start):
        fit = OLS(y[:r], X[:r]).fit()
        t_value = w_r / math.sqrt(fit.ssr / (r - 3))
        expected.append(stats.norm.ppf(stats.t.cdf(t_value, r - 3)))
    np.testing.assert_allclose(scores.score, expected, rtol=1e-7, atol=1e-9)


def test_scores_of_a_stable_process_are_independent_standard_normal(rng):
    X, y = _design(rng, 2090)
    reference = ForecastReference.from_rows(X[:90], y[:90])
    scores, _ = score_rows(reference, X[90:], y[90:], [0, 1, 2], watched_columns=[1, 2])
    q = np.array(scores.score)
    # Kolmogorov-Smirnov against N(0,1) (scipy.stats.kstest) at the 0.1 % level
    assert stats.kstest(q, "norm").pvalue > 1e-3
    assert abs(np.corrcoef(q[1:], q[:-1])[0, 1]) < 4 / math.sqrt(q.size)
    for values in [*scores.pulls.values(), scores.serial[1:]]:
        assert stats.kstest(values, "norm").pvalue > 1e-3


def test_frozen_reference_does_not_learn_and_reference_round_trips(rng):
    X, y = _design(rng, 100)
    reference = ForecastReference.from_rows(X[:90], y[:90])
    _, frozen = score_rows(reference, X[90:], y[90:], [0, 1, 2], absorb=False)
    assert frozen.R == reference.R and frozen.n_rows == 90
    assert math.isfinite(frozen.previous_score)
    assert ForecastReference.from_dict(frozen.to_dict()) == frozen


def test_a_changed_slope_moves_its_pull_scores(rng):
    X, y = _design(rng, 190)
    y[90:] += 1.0 * X[90:, 1]  # slope of column 1 grows by one noise-scale unit
    reference = ForecastReference.from_rows(X[:90], y[:90])
    scores, _ = score_rows(reference, X[90:], y[90:], [0, 1, 2], watched_columns=[1, 2],
                           absorb=False)
    assert np.mean(scores.pulls[1]) > 0.5
    assert abs(np.mean(scores.pulls[2])) < 0.4


def test_serial_signal_chart_arl_agrees_with_the_normal_markov_chain(rng):
    """q_t·sign(q_{t−1}) has independent N(0,1) increments, so the normal chain applies."""
    allowance, threshold = 0.2, 6.0
    predicted = markov_chain_arl(allowance, threshold)
    replicates = 3000
    previous = rng.standard_normal(replicates)

    def draw(g, n):
        nonlocal previous
        current = g.standard_normal(n)
        signal = current * np.sign(previous)
        previous = current
        return signal

    simulated = _simulated_arl(rng, allowance, threshold, draw, replicates)
    # 3000 run lengths: standard error about 1.8 %
    assert simulated == pytest.approx(predicted, rel=0.07)
