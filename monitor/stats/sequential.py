"""Sequential change detection on the nightly stream of forecast errors.

A fixed-window test repeated every night on overlapping windows raises a false
alarm every few weeks by chance alone.  Page's cumulative sum (CUSUM) controls
the *run length* instead: the expected number of nights between false alarms
(the in-control average run length, ARL₀) is chosen, and the threshold follows
from it.  This module holds three pure pieces:

1. :class:`ForecastReference` and :func:`score_rows`: one-step-ahead forecast
   errors of the chosen model against a reference fit that grows row by row
   (recursive residuals), studentized and mapped to exact standard normal
   scores.  Under a stable process the scores are independent N(0, 1), whatever
   the regressors, so every chart below is calibrated without guesswork.
2. :class:`CusumSettings`, :class:`CusumState` and :func:`cusum_step`: Page's
   CUSUM, one- or two-sided, with an optional burn-in that standardizes a raw
   statistic by its own early mean and standard deviation; the state is a small
   frozen dataclass carried from night to night.
3. ARL calibration: :func:`siegmund_arl`, :func:`markov_chain_arl` and
   :func:`threshold_for_arl` choose h for a target ARL₀.

Signals made from the normal scores ``q`` (one per new row, in time order):

* level   ``q``                         two-sided, detects a bias of the forecasts;
* scale   ``q²`` (χ²₁ in control)       upper, allowance 2·ln 2 = the likelihood-ratio
  CUSUM for a doubling of the error variance;
* serial  ``q_t · sign(q_{t-1})`` (N(0, 1) in control, exactly, and independent
  from row to row, because q_t is independent of the past): upper, detects
  positive autocorrelation of the errors (mean ≈ 0.8ρ under an AR(1) with ρ);
* pull    ``q · sign(a_j)`` with ``a = (X'X)⁻¹x`` the row's pull on coefficient j
  (N(0, 1) in control, exactly, because q is independent of x): two-sided,
  detects a change of that coefficient; for a column that only a larger
  candidate has, it detects that the larger candidate now explains what the
  chosen one leaves in its errors.

Notes
-----
Studentized recursive residual of row r: ``w_r = (y_r − x_r'b_{r−1}) /
√(1 + x_r'(X'X)⁻¹_{r−1} x_r)`` and ``T_r = w_r / s_{r−1}`` with ``s²_{r−1}`` the
residual variance of the reference (``n − p`` degrees of freedom).  ``T_r``
follows Student's t with ``n − p`` d.f., independently from row to row, and
``q_r = Φ⁻¹(F_t(T_r))`` is standard normal (the conditional probability
integral transform behind Quesenberry's Q statistics [M]).  The reference keeps
absorbing rows while no sequential alarm is open; while one is open the caller
passes ``absorb=False`` so a change is not learnt as the new normal.

Nightly statistics from overlapping windows are autocorrelated, which shortens
ARL₀ (METHODS §11); the signals above are not, which is why the charts run on
them.  Every signal is a score times a sign fixed before the score was seen, so
in control each is an independent N(0, 1) sequence and one normal ARL table
serves all charts but the scale chart (χ²₁).  The plain product
``q_t·q_{t−1}`` would carry slightly more information about ρ, but products of
neighbours share a factor: measured by simulation, its true ARL₀ is only 0.62 of
the independent-increment Markov chain's at h = 11, k = 0.25.

References
----------
Page, E. S. (1954). Continuous inspection schemes. Biometrika 41(1/2), 100-115.
Brown, R. L., Durbin, J., Evans, J. M. (1975). Techniques for testing the
constancy of regression relationships over time. JRSS B 37(2), 149-192.
Brook, D., Evans, D. A. (1972). An approach to the probability distribution of
CUSUM run length. Biometrika 59(3), 539-549 [M: volume and pages].
Siegmund, D. (1985). Sequential Analysis: Tests and Confidence Intervals.
Springer, New York [M: the correction 1.166 = 2 × 0.583].
Quesenberry, C. P. (1991). SPC Q charts for start-up processes and short or long
runs. Journal of Quality Technology 23(3), 213-224 [M].
Moustakides, G. V. (1986). Optimal stopping times for detecting changes in
distributions. Annals of Statistics 14(4), 1379-1387 [M] (CUSUM optimality).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from scipy import optimize, stats
from scipy.linalg import solve_triangular

from .._types import FloatArray

__all__ = [
    "CusumSettings",
    "CusumState",
    "CusumStep",
    "ForecastReference",
    "RowScores",
    "SIEGMUND_CORRECTION",
    "cusum_run",
    "cusum_step",
    "markov_chain_arl",
    "score_rows",
    "siegmund_arl",
    "threshold_for_arl",
    "two_sided_arl",
]

#: Siegmund's (1985) boundary correction for normal increments: b = h + 1.166 [M].
SIEGMUND_CORRECTION = 1.166
#: Scores are clipped to this many standard deviations (beyond float precision of Φ⁻¹).
_SCORE_LIMIT = 8.0


# ----------------------------------------------------------------------------- CUSUM


@dataclass(frozen=True, slots=True)
class CusumSettings:
    """Settings of one Page CUSUM chart.

    Attributes
    ----------
    allowance
        ``k``: subtracted from each standardized value; half the shift (in
        standard deviations) the chart is tuned to detect.
    threshold
        ``h``: the chart signals when a cumulative sum exceeds it.
    two_sided
        Watch for upward and downward shifts (two sums) or upward only.
    burn_in_nights
        When positive, the first ``burn_in_nights`` values only estimate the
        statistic's mean and standard deviation; later values are standardized
        with them.  Zero when the values are already standardized.
    ceiling_multiple
        Each sum is capped at ``ceiling_multiple × threshold``.  The chart is not
        reset at an alarm (the alarm lasts while the sum stays above h, which is
        what alert persistence needs); the cap bounds how long it takes to come
        back below h once a change is over: at most
        ``(ceiling_multiple − 1) × h / allowance`` nights on average.
    """

    allowance: float
    threshold: float
    two_sided: bool = True
    burn_in_nights: int = 0
    ceiling_multiple: float = 1.5

    def __post_init__(self) -> None:
        if not (self.threshold > 0 and math.isfinite(self.threshold)):
            raise ValueError(f"CUSUM threshold must be positive and finite, got {self.threshold}")
        if not math.isfinite(self.allowance):
            raise ValueError(f"CUSUM allowance must be finite, got {self.allowance}")
        if self.burn_in_nights < 0 or self.burn_in_nights == 1:
            raise ValueError("CUSUM burn_in_nights must be 0 or at least 2, "
                             f"got {self.burn_in_nights}")
        if self.ceiling_multiple < 1:
            raise ValueError(f"CUSUM ceiling_multiple must be >= 1, got {self.ceiling_multiple}")

    def to_dict(self) -> dict[str, Any]:
        return {"allowance": self.allowance, "threshold": self.threshold,
                "two_sided": self.two_sided, "burn_in_nights": self.burn_in_nights,
                "ceiling_multiple": self.ceiling_multiple}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> CusumSettings:
        return cls(float(data["allowance"]), float(data["threshold"]), bool(data["two_sided"]),
                   int(data["burn_in_nights"]), float(data["ceiling_multiple"]))


@dataclass(frozen=True, slots=True)
class CusumState:
    """What a chart carries from one night to the next (serialisable).

    ``upper``/``lower`` are the two cumulative sums (``lower`` stays 0 for a
    one-sided chart); ``upper_since``/``lower_since`` the 0-based index of the
    observation where the current excursion began (the usual change-point
    estimate), or -1 when the sum is 0.  ``burn_in_count``, ``burn_in_mean``
    and ``burn_in_m2`` are Welford's running moments of the burn-in values.
    """

    observations: int = 0
    upper: float = 0.0
    lower: float = 0.0
    upper_since: int = -1
    lower_since: int = -1
    burn_in_count: int = 0
    burn_in_mean: float = 0.0
    burn_in_m2: float = 0.0

    def to_dict(self) -> dict[str, Any]:
        return {name: getattr(self, name) for name in self.__slots__}  # type: ignore[attr-defined]

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> CusumState:
        return cls(int(data["observations"]), float(data["upper"]), float(data["lower"]),
                   int(data["upper_since"]), int(data["lower_since"]),
                   int(data["burn_in_count"]), float(data["burn_in_mean"]),
                   float(data["burn_in_m2"]))


@dataclass(frozen=True, slots=True)
class CusumStep:
    """One observation's effect on a chart.

    ``standardized`` is None during burn-in.  ``statistic`` is the larger of the
    two sums, ``direction`` which one ("up" or "down"), ``is_alarm`` whether it
    exceeds the threshold, ``since`` the observation index where the excursion
    began (-1 when none), ``is_burning_in`` whether the value only fed the burn-in.
    """

    standardized: float | None
    statistic: float
    direction: str
    is_alarm: bool
    since: int
    is_burning_in: bool

    def to_dict(self) -> dict[str, Any]:
        return {name: getattr(self, name) for name in self.__slots__}  # type: ignore[attr-defined]


def cusum_step(state: CusumState, value: float,
               settings: CusumSettings) -> tuple[CusumState, CusumStep]:
    """Advance a chart by one observation: ``S⁺ = max(0, S⁺ + x − k)``, ``S⁻ = max(0, S⁻ − x − k)``.

    Non-finite values are skipped (the state is returned unchanged, with a
    step that reports the current sums).
    """
    index = state.observations
    if not math.isfinite(value):
        return state, _report(state, settings, None, is_burning_in=False)
    if state.burn_in_count < settings.burn_in_nights:
        count = state.burn_in_count + 1
        delta = value - state.burn_in_mean
        mean = state.burn_in_mean + delta / count
        m2 = state.burn_in_m2 + delta * (value - mean)
        new = replace(state, observations=index + 1, burn_in_count=count, burn_in_mean=mean,
                      burn_in_m2=m2)
        return new, _report(new, settings, None, is_burning_in=True)
    x = value
    if settings.burn_in_nights:
        sd = math.sqrt(state.burn_in_m2 / (state.burn_in_count - 1))
        x = (value - state.burn_in_mean) / sd if sd > 0 else 0.0
    ceiling = settings.ceiling_multiple * settings.threshold
    upper = min(ceiling, max(0.0, state.upper + x - settings.allowance))
    upper_since = -1 if upper == 0.0 else (state.upper_since if state.upper > 0 else index)
    lower, lower_since = 0.0, -1
    if settings.two_sided:
        lower = min(ceiling, max(0.0, state.lower - x - settings.allowance))
        lower_since = -1 if lower == 0.0 else (state.lower_since if state.lower > 0 else index)
    new = replace(state, observations=index + 1, upper=upper, lower=lower,
                  upper_since=upper_since, lower_since=lower_since)
    return new, _report(new, settings, x, is_burning_in=False)


def _report(state: CusumState, settings: CusumSettings, standardized: float | None,
            *, is_burning_in: bool) -> CusumStep:
    if state.lower > state.upper:
        statistic, direction, since = state.lower, "down", state.lower_since
    else:
        statistic, direction, since = state.upper, "up", state.upper_since
    return CusumStep(standardized, statistic, direction, statistic > settings.threshold,
                     since, is_burning_in)


def cusum_run(values: Sequence[float] | FloatArray, settings: CusumSettings,
              state: CusumState | None = None) -> tuple[CusumState, list[CusumStep]]:
    """Feed several observations in order; returns the final state and every step."""
    current = CusumState() if state is None else state
    steps = []
    for value in np.asarray(values, dtype=np.float64):
        current, step = cusum_step(current, float(value), settings)
        steps.append(step)
    return current, steps


# ----------------------------------------------------------------------------- ARL


def siegmund_arl(allowance: float, threshold: float, shift: float = 0.0) -> float:
    """Siegmund's approximation to the ARL of a one-sided CUSUM on N(shift, 1) values.

    Notes
    -----
    ``ARL ≈ (exp(−2Δb) + 2Δb − 1) / (2Δ²)`` with ``Δ = shift − allowance`` and
    ``b = threshold + 1.166``; ``b²`` when Δ = 0.  Accurate to a few per cent
    for the usual k and h (METHODS §11: k = .5, h = 4 gives 338 against 335 by
    the Markov chain).

    References
    ----------
    Siegmund, D. (1985). Sequential Analysis. Springer [M].
    """
    delta = shift - allowance
    b = threshold + SIEGMUND_CORRECTION
    if abs(delta) < 1e-12:
        return b * b
    return (math.exp(-2 * delta * b) + 2 * delta * b - 1) / (2 * delta * delta)


def two_sided_arl(arl_upper: float, arl_lower: float) -> float:
    """ARL of two one-sided charts run together: ``1/ARL = 1/ARL⁺ + 1/ARL⁻`` (METHODS §11)."""
    return 1.0 / (1.0 / arl_upper + 1.0 / arl_lower)


def markov_chain_arl(allowance: float, threshold: float,
                     cdf: Callable[[FloatArray], FloatArray] | None = None,
                     *, states: int = 400, start: float = 0.0) -> float:
    """ARL of the one-sided chart ``S = max(0, S + x − k)``, alarm when ``S > h``.

    Parameters
    ----------
    cdf
        Cumulative distribution function of the (independent, identically
        distributed) values x, vectorised; the standard normal when omitted.
        Any continuous law works: ``scipy.stats.chi2(1).cdf`` for a χ²₁ chart,
        a shifted normal for an out-of-control ARL.
    states
        Number of states of the discretised chain.
    start
        Starting value of the sum (a head start); 0 for the usual chart.

    Notes
    -----
    Brook and Evans (1972): ``[0, h]`` is cut into ``N`` cells of width
    ``w = 2h/(2N − 1)``; cell 0 is ``[0, w/2)`` and holds the sum's atom at 0,
    cell i is centred at ``i·w``.  With ``P`` the transition matrix among the
    non-absorbing cells, the vector of ARLs is ``(I − P)⁻¹ 1``.
    """
    distribution = stats.norm.cdf if cdf is None else cdf
    width = 2.0 * threshold / (2 * states - 1)
    # F at (upper edge of cell j − centre of cell i + k) = F((j − i + ½)·w + k): it
    # depends on j − i only, so the law is evaluated at 2N − 1 points
    offsets = np.arange(-(states - 1), states)
    values = np.asarray(distribution((offsets + 0.5) * width + allowance), dtype=np.float64)
    index = np.arange(states)
    cumulative = values[index[None, :] - index[:, None] + states - 1]
    P = np.empty((states, states))
    P[:, 0] = cumulative[:, 0]
    P[:, 1:] = np.diff(cumulative, axis=1)
    arl = np.linalg.solve(np.eye(states) - P, np.ones(states))
    cell = min(states - 1, int(round(start / width)))
    return float(arl[cell])


def threshold_for_arl(target_arl: float, allowance: float,
                      cdf: Callable[[FloatArray], FloatArray] | None = None,
                      *, two_sided: bool = False, states: int = 300) -> float:
    """The threshold h whose in-control ARL (Markov chain) equals ``target_arl``.

    For ``two_sided=True`` the law of x must be symmetric and the target is the
    combined ARL of both sums (each gets twice the target).
    """
    if target_arl <= 1:
        raise ValueError(f"target ARL must exceed 1, got {target_arl}")
    one_side = 2.0 * target_arl if two_sided else float(target_arl)

    def gap(h: float) -> float:
        return math.log(markov_chain_arl(allowance, h, cdf, states=states)) - math.log(one_side)

    high = 1.0
    while gap(high) < 0:
        high *= 2.0
        if high > 1e4:
            raise ValueError(f"no threshold reaches ARL {target_arl} with allowance {allowance}")
    return float(optimize.brentq(gap, 1e-6, high, xtol=1e-6))


# ----------------------------------------------------------------------------- forecast errors


@dataclass(frozen=True, slots=True)
class ForecastReference:
    """The reference fit that one-step-ahead forecast errors are measured against.

    Holds the upper-triangular factor ``R`` of ``[X | y]`` over the reference
    rows, for the union of the columns the chosen model and its larger
    candidates use (the caller includes a column of ones when models have an
    intercept; columns are in the caller's order).  ``previous_score`` is the
    last row's normal score (for the serial signal), NaN before the first.

    Serialise with :meth:`to_dict` / :meth:`from_dict`; ``R`` is stored as
    nested lists (``(q + 1)²`` numbers for q columns).
    """

    R: tuple[tuple[float, ...], ...]
    n_rows: int
    previous_score: float = float("nan")

    @classmethod
    def from_rows(cls, X: FloatArray, y: FloatArray) -> ForecastReference:
        """Build a reference from baseline rows (``X``: rows × union columns)."""
        Z = np.column_stack([np.asarray(X, dtype=np.float64), np.asarray(y, dtype=np.float64)])
        R = np.linalg.qr(Z, mode="r")
        width = Z.shape[1]
        square = np.zeros((width, width))
        square[: R.shape[0]] = R[:width]
        return cls(_as_tuple(square), int(Z.shape[0]))

    def factor(self) -> FloatArray:
        return np.array(self.R, dtype=np.float64)

    def to_dict(self) -> dict[str, Any]:
        previous = self.previous_score
        return {"R": [list(row) for row in self.R], "n_rows": self.n_rows,
                "previous_score": previous if math.isfinite(previous) else None}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> ForecastReference:
        previous = data.get("previous_score")
        return cls(tuple(tuple(float(v) for v in row) for row in data["R"]), int(data["n_rows"]),
                   float("nan") if previous is None else float(previous))


def _as_tuple(matrix: FloatArray) -> tuple[tuple[float, ...], ...]:
    return tuple(tuple(float(v) for v in row) for row in matrix)


@dataclass(frozen=True, slots=True)
class RowScores:
    """Normal scores of new rows (one entry per row, in time order).

    Attributes
    ----------
    score
        ``q``: standard normal in control (studentized recursive residual through
        its t distribution).
    squared
        ``q²``: χ²₁ in control.
    serial
        ``q_t·sign(q_{t−1})`` (NaN for the very first row ever scored).
    pulls
        Column index (into the union columns) → ``q·sign(a)`` per row, for each
        chosen column named in ``watched_columns`` and each extra column of the
        larger candidates.
    forecast_error
        The raw one-step-ahead forecast errors ``y − x'b`` (response units).
    """

    score: tuple[float, ...]
    squared: tuple[float, ...]
    serial: tuple[float, ...]
    pulls: Mapping[int, tuple[float, ...]] = field(default_factory=dict)
    forecast_error: tuple[float, ...] = ()


def _subset_solution(R_full: FloatArray,
                     columns: Sequence[int]) -> tuple[FloatArray, FloatArray, float]:
    """(R_S, b_S, ssr_S) of the model on ``columns`` from the factor of ``[X | y]``."""
    width = R_full.shape[0]
    factor = np.linalg.qr(R_full[:, [*columns, width - 1]], mode="r")
    p = len(columns)
    R_S = factor[:p, :p]
    b = solve_triangular(R_S, factor[:p, p], lower=False)
    ssr = float(factor[p, p] ** 2) if factor.shape[0] > p else 0.0
    return R_S, b, ssr


def score_rows(
    reference: ForecastReference,
    X: FloatArray,
    y: FloatArray,
    chosen_columns: Sequence[int],
    *,
    watched_columns: Sequence[int] = (),
    larger_candidates: Sequence[Sequence[int]] = (),
    absorb: bool = True,
) -> tuple[RowScores, ForecastReference]:
    """Score a night's new rows against the reference, row by row in time order.

    Parameters
    ----------
    reference
        The reference fit (baseline rows plus the rows absorbed since).
    X, y
        The night's new rows over the union columns, and the response.
    chosen_columns
        Indices (into the union columns) of the chosen model's columns.
    watched_columns
        Chosen columns whose coefficient pull is tracked (usually all but the
        intercept).
    larger_candidates
        Column index sets of larger candidates; their columns not in the chosen
        model get a pull signal each, from the candidate's own reference fit.
    absorb
        Add each scored row to the reference (recursive residuals).  Pass False
        while a sequential alarm is open, so a change is not learnt as normal.

    Returns
    -------
    scores, new_reference
    """
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    chosen = list(chosen_columns)
    p = len(chosen)
    R_full = reference.factor()
    n = reference.n_rows
    previous = reference.previous_score
    extras: list[tuple[int, list[int]]] = []  # (extra column, candidate columns)
    for candidate in larger_candidates:
        for column in candidate:
            if column not in chosen:
                extras.append((column, list(candidate)))
    watched = [chosen.index(c) for c in watched_columns]
    scores, squared, serial, errors = [], [], [], []
    pulls: dict[int, list[float]] = {c: [] for c in watched_columns}
    for column, _ in extras:
        pulls.setdefault(column, [])
    for row in range(X.shape[0]):
        x_row = X[row]
        R_S, b, ssr = _subset_solution(R_full, chosen)
        x_S = x_row[chosen]
        error = float(y[row] - x_S @ b)
        half = solve_triangular(R_S, x_S, trans="T", lower=False)  # R^-T x
        leverage = float(half @ half)
        df = n - p
        if df < 1 or ssr <= 0:
            raise ValueError(f"the reference has {n} rows for {p} columns; it needs more rows "
                             "than columns and a positive residual sum of squares")
        t_value = error / math.sqrt(1.0 + leverage) / math.sqrt(ssr / df)
        tail = float(stats.t.sf(abs(t_value), df))
        q = math.copysign(min(_SCORE_LIMIT, float(stats.norm.isf(tail))), t_value)
        scores.append(q)
        squared.append(q * q)
        serial.append(q * _sign(previous) if math.isfinite(previous) else float("nan"))
        errors.append(error)
        pull = solve_triangular(R_S, half, lower=False)  # (X'X)^-1 x
        for position, column in zip(watched, watched_columns, strict=True):
            pulls[column].append(q * _sign(pull[position]))
        for column, candidate in extras:
            R_L, _, _ = _subset_solution(R_full, candidate)
            x_L = x_row[candidate]
            pull_L = solve_triangular(R_L, solve_triangular(R_L, x_L, trans="T", lower=False),
                                      lower=False)
            pulls[column].append(q * _sign(pull_L[candidate.index(column)]))
        previous = q
        if absorb:
            stacked = np.vstack([R_full, np.append(x_row, y[row])])
            R_full = np.linalg.qr(stacked, mode="r")
            n += 1
    new_reference = ForecastReference(_as_tuple(R_full), n, previous)
    return (RowScores(tuple(scores), tuple(squared), tuple(serial),
                      {c: tuple(v) for c, v in pulls.items()}, tuple(errors)),
            new_reference)


def _sign(value: float) -> float:
    return 1.0 if value >= 0 else -1.0
