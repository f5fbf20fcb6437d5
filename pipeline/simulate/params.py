"""Parameters of the demo simulator and the invented scenario it plays out.

Everything here is invented: the utility, the towns, the weather stations and
the rate plans exist only in this simulator.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date

from pipeline.features import StateSpace


class SimulationError(ValueError):
    """Simulator parameters or a policy table that cannot be simulated as given."""


@dataclass(frozen=True)
class Station:
    """One invented weather station and the climate it reports."""

    station_id: str
    """Identifier written to the weather landing files."""
    town: str
    """Invented town the station stands in."""
    timezone: str
    """IANA time zone of the homes around the station."""
    peak_mean_c: float
    """Daily mean outdoor temperature at the height of summer, °C."""
    diurnal_amplitude_c: float
    """Half the day-night swing on a clear day, °C."""
    unit: str
    """Unit the station reports in: "c" or "f"."""
    utc_suffix: str
    """How the station writes UTC in observed_at: "Z" or "+00:00"."""
    share: float
    """Share of premises attached to this station."""
    winter_mean_c: float = 0.0
    """Daily mean outdoor temperature in the depth of winter (about January 20), °C."""


@dataclass(frozen=True)
class RateRow:
    """One row of a time-of-use tariff: a price over local hours of some months and day type."""

    months: str
    """Month range, inclusive, e.g. "6-9"."""
    day_type: str
    """"weekday" or "weekend"."""
    start_hour: int
    """First local hour the price applies to."""
    end_hour: int
    """Local hour the price stops applying (exclusive)."""
    price_per_kwh: float
    """Energy price, USD per kWh."""


def _tou_rows() -> tuple[RateRow, ...]:
    summer = "6-9"
    rows = [
        RateRow(summer, "weekday", 0, 11, 0.09),
        RateRow(summer, "weekday", 11, 14, 0.16),
        RateRow(summer, "weekday", 14, 19, 0.32),
        RateRow(summer, "weekday", 19, 22, 0.16),
        RateRow(summer, "weekday", 22, 24, 0.09),
        RateRow(summer, "weekend", 0, 14, 0.09),
        RateRow(summer, "weekend", 14, 19, 0.16),
        RateRow(summer, "weekend", 19, 24, 0.09),
    ]
    for months in ("1-5", "10-12"):
        rows += [
            RateRow(months, "weekday", 0, 7, 0.09),
            RateRow(months, "weekday", 7, 22, 0.16),
            RateRow(months, "weekday", 22, 24, 0.09),
            RateRow(months, "weekend", 0, 24, 0.09),
        ]
    return tuple(rows)


def _flat_rows() -> tuple[RateRow, ...]:
    return (RateRow("1-12", "weekday", 0, 24, 0.14), RateRow("1-12", "weekend", 0, 24, 0.14))


def _default_stations() -> tuple[Station, ...]:
    return (
        Station("VRW-01", "Varrow Creek", "America/Chicago", 29.0, 5.5, "c", "Z", 0.40, winter_mean_c=-1.0),
        Station("DNM-02", "Dunmere", "America/Chicago", 28.0, 4.5, "c", "+00:00", 0.35, winter_mean_c=0.5),
        Station("OST-03", "Ostrel Mesa", "America/Denver", 25.5, 8.0, "f", "Z", 0.25, winter_mean_c=-3.0),
    )


def _default_plans() -> tuple[tuple[str, tuple[RateRow, ...]], ...]:
    return (("TOU-SUMMER", _tou_rows()), ("FLAT-STD", _flat_rows()))


SEASONS = ("summer", "winter")
"""Seasons the simulator plays out."""


@dataclass(frozen=True)
class HeatingParams:
    """Heating systems and winter weather of the heating season, each range drawn uniformly per home."""

    heat_pump_share: float = 0.5
    """Share of homes heated by an air-source heat pump; the rest burn gas in a furnace."""
    cop_rated: tuple[float, float] = (2.8, 3.6)
    """Range of the heat pump's COP at 8.3 °C (47 °F) outdoors."""
    cop_slope: float = 0.025
    """Share of the rated COP lost per °C colder outdoors (gained per °C warmer)."""
    cop_share: tuple[float, float] = (0.45, 1.2)
    """Bounds of the COP as a share of the rated one, so COP lies in 0.45 * 2.8 .. 1.2 * 3.6."""
    capacity_slope: float = 0.02
    """Share of the rated heat pump capacity lost per °C colder outdoors."""
    capacity_share: tuple[float, float] = (0.35, 1.1)
    """Bounds of the heat pump capacity as a share of the rated one."""
    balance_c: tuple[float, float] = (-6.0, 0.0)
    """Range of the heat pump's balance point, °C outdoors; the resistance back-up runs only below it."""
    design_c: float = -20.0
    """Outdoor design temperature, °C: the back-up alone, or the furnace with its margin, carries the
    home at comfort there."""
    heat_pump_fan_kw_per_kw: float = 0.04
    """Heat pump indoor fan power per kW of rated capacity, kW."""
    furnace_margin: tuple[float, float] = (1.2, 1.6)
    """Range of furnace output over the home's conduction load at the design temperature."""
    furnace_efficiency: tuple[float, float] = (0.80, 0.96)
    """Range of the furnace's fixed efficiency, heat delivered per unit of gas energy."""
    furnace_fan_kw: tuple[float, float] = (0.3, 0.6)
    """Range of the furnace blower's electric power while firing, kW (all the meter sees of it)."""
    seasonal_rise_c: float = 6.0
    """Half the rise of the daily mean from January 20 to July 20, °C."""
    cold_snap_every_days: float = 20.0
    """Mean days between cold snaps shared by the region."""
    cold_snap_depth_c: tuple[float, float] = (6.0, 12.0)
    """Range of the drop in daily mean at the height of a cold snap, °C."""


@dataclass(frozen=True)
class SimParams:
    """Everything that determines a simulated lake; the same parameters give the same bytes."""

    n_premises: int = 60
    """Number of homes simulated."""
    seed: int = 20260601
    """The one seed every random stream is derived from."""
    start: date = date(2026, 6, 1)
    """First local day of the lake."""
    days: int = 92
    """Number of local days covered."""
    substep_minutes: int = 5
    """Integration step of the thermal model, minutes (must divide 15)."""
    recovery_hours: int = 1
    """Hours after the return hour charged to an episode (as in the pipeline)."""
    penalty_usd_per_degree_hour: float = 0.10
    """Comfort penalty per °C of setback still in force at return, per recovery hour, USD."""
    cool_band_c: tuple[int, int] = (22, 30)
    """Safety band for cooling setpoints, °C; actions leaving it get probability zero."""
    deadband_c: float = 0.5
    """Half-width of the thermostat's hysteresis around the setpoint, °C."""
    share_without_presence: float = 0.15
    """Share of homes whose thermostat has no presence sensing (occupied left empty)."""
    share_tou: float = 0.6
    """Share of homes on the time-of-use plan; the rest are on the flat plan."""
    share_estimated: float = 0.002
    """Share of meter intervals flagged "estimated" (values kept as measured)."""
    weekday_away_prob: tuple[float, float] = (0.6, 0.9)
    """Range of the per-home probability of leaving on a weekday."""
    weekend_away_prob: float = 0.08
    """Probability of an away day on a weekend."""
    depart_window_h: tuple[float, float] = (7.0, 9.0)
    """Local hours between which residents leave."""
    return_window_h: tuple[float, float] = (16.0, 19.0)
    """Local hours between which residents come back."""
    depth_pref_probs: tuple[float, float, float] = (0.45, 0.40, 0.15)
    """Share of homes whose habitual setback depth is 1, 2 and 3 °C."""
    early_restore_share: float = 0.3
    """Share of homes whose residents restore comfort one decision before the last."""
    hidden_confounder: bool = False
    """If true, a hidden 'feeling hot' day state raises home gains and discourages setbacks."""
    hidden_hot_prob: float = 0.3
    """Probability of a 'feeling hot' day when the hidden confounder is on."""
    stations: tuple[Station, ...] = field(default_factory=_default_stations)
    """Invented weather stations and their climates."""
    plans: tuple[tuple[str, tuple[RateRow, ...]], ...] = field(default_factory=_default_plans)
    """Invented rate plans (id, rows): the time-of-use one first, the flat one second."""
    state: StateSpace = field(default_factory=StateSpace)
    """State binning shared with the pipeline."""
    season: str = "summer"
    """"summer" (air conditioning, cooling setpoints) or "winter" (heating systems, heating setpoints)."""
    heat_band_c: tuple[int, int] = (13, 23)
    """Safety band for heating setpoints, °C; 13 °C guards against frozen pipes (common practice)."""
    heating: HeatingParams = field(default_factory=HeatingParams)
    """Heating systems and winter weather, used when ``season`` is "winter"."""

    def __post_init__(self) -> None:
        if self.season not in SEASONS:
            raise SimulationError(f"season {self.season!r}: must be one of {', '.join(SEASONS)}")

    @property
    def heating_season(self) -> bool:
        """Whether homes heat (winter) rather than cool (summer)."""
        return self.season == "winter"


def winter_params(**overrides) -> SimParams:
    """The winter demo scenario: December to February, deeper habitual setbacks, more early restores."""
    values = {
        "season": "winter",
        "seed": 20261201,
        "start": date(2026, 12, 1),
        "days": 62,
        "n_premises": 40,
        "depth_pref_probs": (0.30, 0.45, 0.25),
        "early_restore_share": 0.45,
        **overrides,
    }
    return SimParams(**values)
