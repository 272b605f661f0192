"""The default alert policy and the nightly sequential watch.

:class:`AlertPolicy` gathers every setting that decides when an alert opens.
Its defaults were measured with ``tests/benchmarks/sim_false_alarms.py`` (one
row a day, 90-day window, chosen model with two inputs and one larger
candidate; invented data, seeds in the script):

* stable process, 100 monitor-years: 46 alerts opened, 0.46 per monitor-year;
* nights from a planted change to the first alert, 100 replicates each
  (median / 90th percentile / worst, ">150" = not within the 150 nights run):
  slope +1σ per sd of its input 24 / 52 / 139; error variance doubled
  27 / 76 / >150; AR(1) ρ = 0.5 errors 32 / 65 / 120 (42 / 77 / >150 when
  the marginal variance is held fixed); interaction of 1σ 23 / 49 / 81.

The faint changes (variance, AR(1)) carry about 0.15 nats of evidence per
row, so no detector can react in much under ``ln(ARL₀)/0.15`` rows on
average (Lorden 1971 [M]); a month at one row a night is at that limit.

:class:`WatchState` and :func:`watch_night` run the sequential detectors of
:mod:`monitor.stats.sequential` night after night and turn them into
:class:`~monitor.runs.rules.Condition` objects for :func:`~monitor.runs.rules.apply_rules`.

Budget of false alarms
----------------------
The charts of one model share one target, ``nights_between_false_alarms``.
The false-alarm rates of (nearly) independent charts add up (METHODS §11), so
chart i gets the in-control ARL ``target / share_i`` with shares summing to 1.
The shares favour the charts that must find the faintest signals: a doubling of
the error variance or an AR(1) with ρ = 0.5 carries only about 0.15 nats of
evidence per row (Kullback–Leibler), against 0.5 for a one-σ bias, and a CUSUM
needs about ``ln(ARL₀) / KL`` rows to react (Lorden 1971 [M]).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any

from scipy import stats

from .._types import FloatArray
from ..stats.sequential import (
    CusumSettings,
    CusumState,
    ForecastReference,
    cusum_step,
    score_rows,
    threshold_for_arl,
)
from .rules import Condition, Persistence

__all__ = ["AlertPolicy", "WatchState", "chart_settings", "watch_night"]


@dataclass(frozen=True, slots=True)
class AlertPolicy:
    """Every setting that decides when an alert opens and clears.

    Attributes
    ----------
    nights_between_false_alarms
        Target in-control ARL (nights) of all sequential charts of one model
        together.  Default 800: about one false sequential alarm per two years,
        leaving room for the fixed-window checks within one alert per year.
    rows_per_night
        Typical number of new rows a night.  The charts advance once per row,
        so their ARL in rows is ``nights_between_false_alarms × rows_per_night``.
    chart_shares
        Share of the false-alarm budget per chart family: level, scale, serial,
        coefficient pulls (split among them), candidate gains (split among
        them).  Families without charts give their share to the others.
    level_shift
        Forecast bias, in error standard deviations, the level chart is tuned to
        (allowance = half of it).  Default 1.
    variance_ratio
        Ratio of error variances the scale chart is tuned to; its allowance
        ``r·ln r/(r − 1)`` makes it the likelihood-ratio CUSUM for that ratio.
        Default 2.
    serial_allowance
        Allowance of the chart on scores signed by the previous score; their
        mean is about 0.8ρ under lag-1 autocorrelation ρ.  Default 0.2 (tuned
        to ρ = 0.5).
    pull_allowance
        Allowance of the coefficient-pull charts (scores signed by the row's
        pull on the coefficient; a change of the coefficient by one error
        standard deviation per standard deviation of a normal input moves them
        by about 0.8).  Default 0.4.
    gain_allowance
        Allowance of the larger-candidate gain charts.  Default 0.3 (an
        interaction of one error standard deviation between two normal inputs
        moves them by about 0.64).
    watch_coefficients
        Run a pull chart for every slope of the chosen model.
    chart_ceiling_multiple
        Sums are capped at this multiple of their threshold (see CusumSettings).
    watch_fraction
        A chart above ``watch_fraction × h`` (but not above h) is "watch":
        neither breached nor clean; the reference stops learning.  Default 0.5.
    false_discovery_rate
        Benjamini–Hochberg level across the night's fixed-window p-values.
        Default 0.001: a window re-tested every night on 89 of the same rows
        crosses a 5 % level on several nights a year by chance alone.
    window_persistence
        Fixed-window checks open after 4 breached runs of the last 6 and clear
        after 5 clean runs.
    sequential_persistence
        Sequential charts open at their first alarm (the CUSUM has already
        accumulated the evidence) and clear after 5 clean runs.
    data_persistence, schedule_persistence
        Data problems and missed runs open at once and clear at the next clean run.
    window_severity_cap
        Fixed-window checks open at most at this severity ("warning").
    """

    nights_between_false_alarms: float = 800.0
    rows_per_night: float = 1.0
    chart_shares: tuple[tuple[str, float], ...] = (
        ("level", 0.15), ("scale", 0.3), ("serial", 0.3), ("pull", 0.1), ("gain", 0.15))
    level_shift: float = 1.0
    variance_ratio: float = 2.0
    serial_allowance: float = 0.2
    pull_allowance: float = 0.4
    gain_allowance: float = 0.3
    watch_coefficients: bool = True
    chart_ceiling_multiple: float = 1.5
    watch_fraction: float = 0.5
    false_discovery_rate: float = 0.001
    window_persistence: Persistence = field(default_factory=lambda: Persistence(4, 6, 5))
    sequential_persistence: Persistence = field(default_factory=lambda: Persistence(1, 1, 5))
    data_persistence: Persistence = field(default_factory=lambda: Persistence(1, 1, 1))
    schedule_persistence: Persistence = field(default_factory=lambda: Persistence(1, 1, 1))
    window_severity_cap: str = "warning"

    def persistence_by_method(self) -> dict[str, Persistence]:
        return {"sequential": self.sequential_persistence, "window": self.window_persistence,
                "data": self.data_persistence, "schedule": self.schedule_persistence}

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for name in self.__slots__:  # type: ignore[attr-defined]
            value = getattr(self, name)
            if isinstance(value, Persistence):
                value = value.to_dict()
            elif name == "chart_shares":
                value = [list(pair) for pair in value]
            out[name] = value
        return out

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> AlertPolicy:
        values = {}
        for name in cls.__slots__:  # type: ignore[attr-defined]
            if name in data:
                value = data[name]
                if name.endswith("persistence"):
                    value = Persistence.from_dict(value)
                elif name == "chart_shares":
                    value = tuple((str(family), float(share)) for family, share in value)
                values[name] = value
        return cls(**values)


# ----------------------------------------------------------------------------- charts


@lru_cache(maxsize=256)
def _threshold(target: float, allowance: float, law: str, two_sided: bool) -> float:
    cdf = {"normal": None, "chi2": stats.chi2(1).cdf}[law]
    return threshold_for_arl(target, allowance, cdf, two_sided=two_sided)


def chart_settings(policy: AlertPolicy, watched: Sequence[str],
                   extras: Sequence[str]) -> dict[str, CusumSettings]:
    """Settings of every chart of one model: name → CusumSettings.

    Chart names: "level", "scale", "serial", "pull:<coefficient label>" for the
    watched coefficients, "gain:<column label>" for columns only larger
    candidates have.
    """
    pulls = list(watched) if policy.watch_coefficients else []
    members = {"level": 1, "scale": 1, "serial": 1, "pull": len(pulls), "gain": len(extras)}
    shares = {family: share for family, share in policy.chart_shares if members[family]}
    total_share = sum(shares.values())
    ratio = policy.variance_ratio
    scale_allowance = ratio * math.log(ratio) / (ratio - 1.0)
    level_allowance = policy.level_shift / 2.0
    ceiling = policy.chart_ceiling_multiple

    def make(family: str, allowance: float, law: str, two_sided: bool) -> CusumSettings:
        share = shares[family] / total_share / members[family]
        target = policy.nights_between_false_alarms * policy.rows_per_night / share
        h = _threshold(round(target, 6), allowance, law, two_sided)
        return CusumSettings(allowance, h, two_sided, 0, ceiling)

    settings = {
        "level": make("level", level_allowance, "normal", True),
        "scale": make("scale", scale_allowance, "chi2", False),
        "serial": make("serial", policy.serial_allowance, "normal", False),
    }
    for label in pulls:
        settings[f"pull:{label}"] = make("pull", policy.pull_allowance, "normal", True)
    for label in extras:
        settings[f"gain:{label}"] = make("gain", policy.gain_allowance, "normal", True)
    return settings


_CHART_KIND = {"level": "fit_degraded", "scale": "fit_degraded",
               "serial": "assumption_independence", "pull": "coefficients_unstable",
               "gain": "chosen_outranked"}
_CHART_WORDS = {"level": "forecast bias CUSUM", "scale": "forecast error size CUSUM",
                "serial": "error correlation CUSUM", "pull": "coefficient pull CUSUM",
                "gain": "larger-candidate gain CUSUM"}


@dataclass(frozen=True, slots=True)
class WatchState:
    """What the sequential watch of one model carries from night to night."""

    reference: ForecastReference
    charts: tuple[tuple[str, CusumState], ...] = ()
    nights: int = 0

    def chart(self, name: str) -> CusumState:
        return dict(self.charts).get(name, CusumState())

    def to_dict(self) -> dict[str, Any]:
        return {"reference": self.reference.to_dict(),
                "charts": {name: state.to_dict() for name, state in self.charts},
                "nights": self.nights}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> WatchState:
        return cls(ForecastReference.from_dict(data["reference"]),
                   tuple((name, CusumState.from_dict(state))
                         for name, state in data["charts"].items()),
                   int(data["nights"]))


def watch_night(
    state: WatchState,
    X: FloatArray,
    y: FloatArray,
    *,
    policy: AlertPolicy,
    model: str,
    column_labels: Sequence[str],
    chosen_columns: Sequence[int],
    watched_columns: Sequence[int] = (),
    larger_candidates: Sequence[Sequence[int]] = (),
    segment: str = "",
) -> tuple[WatchState, list[Condition]]:
    """Score one night's new rows and advance every chart; one condition per chart.

    ``X`` holds the night's rows over the union columns (``column_labels`` names
    them); the other arguments are as in :func:`monitor.stats.sequential.score_rows`.
    The reference learns the night's rows only if every chart was below its
    watch level before the night.
    """
    extras = sorted({c for cand in larger_candidates for c in cand if c not in chosen_columns})
    settings = chart_settings(policy, [column_labels[c] for c in watched_columns],
                              [column_labels[c] for c in extras])
    calm = all(state.chart(name).upper <= policy.watch_fraction * s.threshold
               and state.chart(name).lower <= policy.watch_fraction * s.threshold
               for name, s in settings.items())
    scores, reference = score_rows(state.reference, X, y, chosen_columns,
                                   watched_columns=watched_columns if policy.watch_coefficients
                                   else (), larger_candidates=larger_candidates, absorb=calm)
    streams: dict[str, Sequence[float]] = {"level": scores.score, "scale": scores.squared,
                                           "serial": scores.serial}
    for column, values in scores.pulls.items():
        prefix = "gain" if column in extras else "pull"
        streams[f"{prefix}:{column_labels[column]}"] = values
    charts = dict(state.charts)
    conditions = []
    for name, chart_setting in settings.items():
        chart = charts.get(name, CusumState())
        step = None
        for value in streams.get(name, ()):
            chart, step = cusum_step(chart, value, chart_setting)
        charts[name] = chart
        statistic = max(chart.upper, chart.lower)
        if statistic > chart_setting.threshold:
            verdict = "breached"
        elif statistic > policy.watch_fraction * chart_setting.threshold:
            verdict = "watch"
        else:
            verdict = "clean"
        family, _, label = name.partition(":")
        direction = "down" if chart.lower > chart.upper else "up"
        detail = ""
        if family == "level":
            detail = "forecasts run " + ("low" if direction == "up" else "high")
        elif family in ("pull", "gain") and step is not None:
            detail = "the data pull the coefficient " + direction + "wards"
        conditions.append(Condition(
            kind=_CHART_KIND[family], verdict=verdict, method="sequential", model=model,
            segment=segment, statistic_name=_CHART_WORDS[family], statistic=statistic,
            threshold=chart_setting.threshold, subject=label, detail=detail))
    return WatchState(reference, tuple(sorted(charts.items())), state.nights + 1), conditions
