"""The demo scenario: an INVENTED district-heating operator and its substations.

Everything in this module is made up for the demonstration.  The operator, the
substations, their physics, the weather and the planted events do not describe
any real place, company or data set.

The story
---------
A district-heating operator forecasts each substation's daily heat delivery
(``heat_mwh``) from the outdoor temperature and wind speed measured at the
substation, the hours of sunshine at the city's weather station, and whether the
day is a weekend or public holiday.  Heat losses of a building grow with the
gap between indoor and outdoor temperature, and wind makes that gap cost more
(draughts and faster cooling of walls), so the generator's true model is::

    heat = base + k * (T_ref - T) + wind * (c_wind + k_wind * (T_ref - T))
           - s_sun * sunshine - d_off * weekend_or_holiday + noise

with ``T_ref`` = 18 °C and independent normal noise of standard deviation
``noise_sd``.  Written as a regression on the recorded columns this is::

    heat_mwh ~ outdoor_temp_c + weekend_or_holiday + sunshine_h + wind_m_s
               + outdoor_temp_c:wind_m_s

with coefficients ``-k`` (temperature), ``-d_off``, ``-s_sun``,
``c_wind + k_wind * T_ref`` (wind), ``-k_wind`` (interaction) and intercept
``base + k * T_ref``.  The noise is independent from day to day on purpose: the
stretches without planted events are meant to be truly stable, so anything a
monitor flags there is a false alarm.

Events are planted on one substation each, at known dates; one substation
(``linden-park``) has none.  :data:`EVENTS` gives their dates, what they change
and by how much, and which signals a user should expect them to raise.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

__all__ = [
    "COLUMNS",
    "DAYS",
    "DEFAULT_SEED",
    "EVENTS",
    "HOLIDAYS",
    "REFERENCE_TEMP_C",
    "SIGNALS",
    "START",
    "SUBSTATIONS",
    "SUBSTATION_NAMES",
    "Column",
    "PlantedEvent",
    "Substation",
    "event_weight",
    "events_for",
    "substation",
]

#: Seed of the default data set (any integer gives another, equally valid draw).
DEFAULT_SEED = 7309
#: First day of the default data set.
START = dt.date(2022, 1, 1)
#: Number of days of the default data set: 2022-01-01 to 2024-12-31 inclusive.
DAYS = 1096
#: Indoor reference temperature of the heating physics, in °C (invented).
REFERENCE_TEMP_C = 18.0
#: Public holidays of the invented city, as (month, day); weekends are added to them.
HOLIDAYS: tuple[tuple[int, int], ...] = ((1, 1), (5, 1), (12, 24), (12, 25), (12, 26), (12, 31))


@dataclass(frozen=True, slots=True)
class Column:
    """One column of the generated readings."""

    name: str
    unit: str
    description: str


#: The columns written to both stores, in order.
COLUMNS: tuple[Column, ...] = (
    Column("row_id", "-", "stable integer id of the row (day index x substations + position)"),
    Column("reading_date", "UTC timestamp", "the day, as midnight UTC (timezone-aware)"),
    Column("substation", "-", "name of the substation (a Hive partition key in Parquet)"),
    Column("heat_mwh", "MWh/day", "heat delivered to the substation's network that day"),
    Column("outdoor_temp_c", "°C", "daily mean outdoor temperature at the substation"),
    Column("wind_m_s", "m/s", "daily mean wind speed at the substation's own sensor"),
    Column("sunshine_h", "h", "hours of sunshine at the city's weather station"),
    Column("weekend_or_holiday", "0/1", "1 on Saturdays, Sundays and public holidays"),
)


@dataclass(frozen=True, slots=True)
class Substation:
    """Invented physics of one substation (see the module docstring for the model).

    Attributes
    ----------
    base_mwh
        Load at ``T_ref`` without wind, sun or weekend (hot water, network losses), MWh/day.
    temp_slope
        ``k``: extra MWh/day per °C colder than ``T_ref``.
    wind_slope
        ``c_wind``: extra MWh/day per m/s of wind at ``T_ref``.
    wind_chill
        ``k_wind``: extra MWh/day per m/s of wind per °C colder than ``T_ref``.
    sun_effect
        ``s_sun``: MWh/day saved per hour of sunshine.
    day_off_effect
        ``d_off``: MWh/day saved on weekends and holidays.
    noise_sd
        Standard deviation of the day-to-day noise, MWh/day.
    temp_offset_c
        Microclimate: the substation's mean temperature minus the city's, °C.
    wind_exposure
        Multiplier of the city's wind at the substation's sensor.
    """

    name: str
    description: str
    base_mwh: float
    temp_slope: float
    wind_slope: float
    wind_chill: float
    sun_effect: float
    day_off_effect: float
    noise_sd: float
    temp_offset_c: float
    wind_exposure: float

    def coefficients(self) -> dict[str, float]:
        """The true coefficients of the chosen formula (before any event)."""
        return {
            "Intercept": self.base_mwh + self.temp_slope * REFERENCE_TEMP_C,
            "outdoor_temp_c": -self.temp_slope,
            "weekend_or_holiday": -self.day_off_effect,
            "sunshine_h": -self.sun_effect,
            "wind_m_s": self.wind_slope + self.wind_chill * REFERENCE_TEMP_C,
            "outdoor_temp_c:wind_m_s": -self.wind_chill,
        }


SUBSTATIONS: tuple[Substation, ...] = (
    Substation("harbour-row", "dense older flats by the harbour", 42.0, 2.20, 0.55, 0.100,
               0.35, 3.0, 3.0, 0.4, 1.15),
    Substation("millbrook", "terraced houses along a stream", 32.0, 1.60, 0.45, 0.080,
               0.25, 2.0, 2.5, -0.3, 1.00),
    Substation("quarry-hill", "a hillside estate with a school", 36.0, 1.90, 0.60, 0.110,
               0.30, 2.5, 2.8, -0.8, 1.10),
    Substation("tannery-lane", "small offices and workshops", 26.0, 1.30, 0.40, 0.070,
               0.20, 1.5, 2.2, 0.2, 0.90),
    Substation("linden-park", "a garden suburb; no events are planted here", 34.0, 1.70, 0.50,
               0.090, 0.30, 2.2, 2.6, -0.2, 0.95),
)
SUBSTATION_NAMES: tuple[str, ...] = tuple(s.name for s in SUBSTATIONS)


def substation(name: str) -> Substation:
    """The substation called ``name``; a ``KeyError`` lists the known names."""
    for candidate in SUBSTATIONS:
        if candidate.name == name:
            return candidate
    raise KeyError(f"unknown substation {name!r}; the scenario has "
                   f"{', '.join(SUBSTATION_NAMES)}")


#: Signals a planted event may raise, as descriptive tags of our own.  They name the kind
#: of evidence, not a specific check, so the demo can map the monitor's alerts onto them.
SIGNALS: dict[str, str] = {
    "coefficient_change": "a coefficient of the chosen model is no longer what it was",
    "level_shift": "the residuals' mean moved away from zero",
    "outliers": "single days far from the prediction",
    "variance_change": "the residuals' spread changed (heteroscedasticity over time)",
    "residual_drift": "the residuals' distribution drifted from the baseline",
    "model_choice": "another candidate now beats the chosen model",
    "normality": "the residuals are no longer close to normal",
}


@dataclass(frozen=True, slots=True)
class PlantedEvent:
    """One change planted in the data of one substation.

    Dates are inclusive: ``start`` is the first affected day, ``end`` the last
    (``None``: the change lasts to the end of the data).  With ``ramp_end`` set,
    the effect grows linearly from nothing before ``start`` to its full size on
    ``ramp_end`` and stays there; otherwise it is a step at ``start``.

    ``size`` is in ``unit``; ``size_in_noise_sd`` restates it against the
    substation's noise (for a slope: noise SDs per standard deviation of the
    regressor over a year, about 6.1 °C for temperature).  For
    ``sensor_outliers`` the size is a range ``size``..``size_high`` applied on
    ``share_of_days`` of the days.
    """

    key: str
    title: str
    substation: str
    kind: str  # "slope_change" | "sensor_outliers" | "variance_regime" | "level_shift"
    start: dt.date
    end: dt.date | None
    ramp_end: dt.date | None
    changes: str
    size: float
    unit: str
    size_in_noise_sd: float
    size_high: float | None = None
    share_of_days: float = 1.0
    expected_signals: tuple[str, ...] = ()
    possible_signals: tuple[str, ...] = ()
    story: str = ""

    def covers(self, day: dt.date) -> bool:
        """Whether ``day`` lies in the event's span (the ramp included)."""
        return self.start <= day and (self.end is None or day <= self.end)


EVENTS: tuple[PlantedEvent, ...] = (
    PlantedEvent(
        key="new-pool", title="A new building shifts the level", substation="tannery-lane",
        kind="level_shift", start=dt.date(2023, 3, 6), end=None, ramp_end=None,
        changes="heat_mwh: constant extra load added every day", size=4.4, unit="MWh/day",
        size_in_noise_sd=2.0, expected_signals=("level_shift", "residual_drift"),
        possible_signals=("coefficient_change",),
        story="A public indoor pool is connected; its hot-water and pool heating add a "
              "steady load that does not depend on the weather."),
    PlantedEvent(
        key="insulation", title="Insulation programme changes the temperature slope",
        substation="harbour-row", kind="slope_change", start=dt.date(2023, 5, 1), end=None,
        ramp_end=dt.date(2023, 9, 30),
        changes="temperature coefficient of the chosen model: -2.20 -> -1.75 MWh/day per °C "
                "(the heating line pivots about 18 °C; the intercept falls by 8.1 MWh/day)",
        size=0.45, unit="MWh/day per °C", size_in_noise_sd=0.9,
        expected_signals=("coefficient_change", "level_shift"),
        possible_signals=("residual_drift",),
        story="Walls and roofs of the harbour flats are insulated over one summer, block by "
              "block; the effect grows linearly from 1 May to 30 September 2023 and shows "
              "once the heating season starts."),
    PlantedEvent(
        key="wind-sensor", title="Failing wind sensor produces outliers", substation="millbrook",
        kind="sensor_outliers", start=dt.date(2023, 12, 4), end=dt.date(2024, 2, 11),
        ramp_end=None,
        changes="wind_m_s: on 7 of the 70 days the sensor reads too high, by as much as "
                "makes the true model over-predict heat by 6-10 noise SD (at the event's "
                "temperatures about 8-18 m/s too high; heat_mwh itself is unaffected)",
        size=6.0, size_high=10.0, share_of_days=0.10, unit="noise SD of the prediction error",
        size_in_noise_sd=6.0, expected_signals=("outliers",),
        possible_signals=("normality", "coefficient_change"),
        story="The anemometer at the Millbrook substation starts sticking and gusting after "
              "an ice storm and is replaced ten weeks later.  Heat delivery is unaffected; "
              "only the recorded wind is wrong on the bad days."),
    PlantedEvent(
        key="summer-regime", title="Summer regime with larger variance",
        substation="quarry-hill", kind="variance_regime", start=dt.date(2024, 6, 1),
        end=dt.date(2024, 8, 31), ramp_end=None,
        changes="noise SD of heat_mwh doubles (2.8 -> 5.6 MWh/day, variance x4)",
        size=2.0, unit="ratio of noise SDs", size_in_noise_sd=2.0,
        expected_signals=("variance_change",),
        possible_signals=("residual_drift", "normality"),
        story="The school on Quarry Hill runs a summer programme with irregular use of its "
              "sports halls and showers, so daily demand swings far more than usual."),
)


def events_for(name: str) -> tuple[PlantedEvent, ...]:
    """The planted events of one substation, in date order."""
    return tuple(sorted((e for e in EVENTS if e.substation == name), key=lambda e: e.start))


def event_weight(event: PlantedEvent, day: dt.date) -> float:
    """How much of ``event``'s size applies on ``day``: 0 outside, 1 at full effect."""
    if not event.covers(day):
        return 0.0
    if event.ramp_end is None or day >= event.ramp_end:
        return 1.0
    span = (event.ramp_end - event.start).days
    return (day - event.start).days / span
