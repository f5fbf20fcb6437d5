"""Exogenous draws of the simulator: clock, weather, tariffs, homes, occupancy, base load.

Nothing here depends on what residents choose, so any setpoint policy can be
rolled out against the very same world. Each premise draws from its own
numpy stream (derived from the one seed and its index), so premise P0007 is the
same home whether the lake holds 10 premises or 1,000.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import TYPE_CHECKING
from zoneinfo import ZoneInfo

import numpy as np

from pipeline.simulate.params import SimParams, SimulationError

if TYPE_CHECKING:
    from pipeline.simulate.heating import HeatingSystems

STREAM_WEATHER = 0
STREAM_PREMISE = 1
STREAM_CHOICE = 2


def stream(seed: int, *key: int) -> np.random.Generator:
    """An independent numpy Generator for one purpose, derived from the one seed."""
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=key))


@dataclass(frozen=True)
class Clock:
    """The UTC hourly grid and what each hour is in local time, per time zone."""

    t0: datetime
    """First instant of the grid (UTC): the earliest local midnight of the start day."""
    n_hours: int
    """Hours simulated; arrays below have n_hours + 1 columns (the grid's end point included)."""
    timezones: tuple[str, ...]
    """IANA zones in use, indexed by the first axis of the arrays."""
    local_hour: np.ndarray
    """Local clock hour, (n_tz, n_hours + 1)."""
    local_day: np.ndarray
    """Local day counted from the start day (may be -1 or ``days`` at the edges), (n_tz, n_hours + 1)."""
    weekend: np.ndarray
    """Local Saturday or Sunday, (n_tz, n_hours + 1)."""
    month: np.ndarray
    """Local month 1..12, (n_tz, n_hours + 1)."""
    hour_index: np.ndarray
    """Grid hour of (tz, local day + 1, local hour), -1 where the local hour does not exist."""


def build_clock(params: SimParams) -> Clock:
    """Lay out the UTC grid that covers every premise's local days."""
    zones = tuple(dict.fromkeys(s.timezone for s in params.stations))
    start = datetime(params.start.year, params.start.month, params.start.day)
    end = start + timedelta(days=params.days)
    t0 = min(start.replace(tzinfo=ZoneInfo(z)).astimezone(UTC) for z in zones)
    t1 = max(end.replace(tzinfo=ZoneInfo(z)).astimezone(UTC) for z in zones)
    n_hours = int((t1 - t0) // timedelta(hours=1))
    shape = (len(zones), n_hours + 1)
    local_hour = np.zeros(shape, dtype=np.int64)
    local_day = np.zeros(shape, dtype=np.int64)
    weekend = np.zeros(shape, dtype=bool)
    month = np.zeros(shape, dtype=np.int64)
    hour_index = np.full((len(zones), params.days + 2, 24), -1, dtype=np.int64)
    start_ordinal = params.start.toordinal()
    for k, zone in enumerate(zones):
        tz = ZoneInfo(zone)
        for h in range(n_hours + 1):
            local = (t0 + timedelta(hours=h)).astimezone(tz)
            d = local.date().toordinal() - start_ordinal
            local_hour[k, h], local_day[k, h] = local.hour, d
            weekend[k, h], month[k, h] = local.weekday() >= 5, local.month
            if -1 <= d <= params.days and hour_index[k, d + 1, local.hour] < 0:
                hour_index[k, d + 1, local.hour] = h
    return Clock(t0, n_hours, zones, local_hour, local_day, weekend, month, hour_index)


@dataclass(frozen=True)
class Weather:
    """Hourly outdoor conditions per station, as published."""

    temp_c: np.ndarray
    """Dry-bulb temperature, °C, as a reader of the published file gets it, (n_stations, n_hours + 1)."""
    published: np.ndarray
    """The value written to the file, in the station's unit, rounded to 0.1, (n_stations, n_hours + 1)."""
    irradiance_kw_m2: np.ndarray
    """Solar irradiance on the homes' glazing, kW/m², (n_stations, n_hours + 1)."""


def build_weather(params: SimParams, clock: Clock) -> Weather:
    """Invent hot summers (seasonal mean, shared heat waves and cool spells, clouds, a diurnal cycle),
    or cold winters with cold snaps when the season is winter (``heating.build_winter_weather``)."""
    rng = stream(params.seed, STREAM_WEATHER)
    if params.heating_season:
        from pipeline.simulate.heating import build_winter_weather

        return _published(params, *build_winter_weather(params, clock, rng))
    n_days, doy = day_of_year(params)
    seasonal_drop = 14.0 * (1.0 - np.cos(2 * np.pi * (doy - 200) / 365.0)) / 2.0
    regional = _ar1(rng, n_days, phi=0.75, sd=1.3)
    add_spells(
        rng, regional, params.days, ((1.0, 35.0, (3, 8), (3.0, 5.5)), (-1.0, 45.0, (2, 5), (3.0, 6.0)))
    )
    n_st = len(params.stations)
    temp = np.zeros((n_st, clock.n_hours + 1))
    irr = np.zeros_like(temp)
    for j, st in enumerate(params.stations):
        k = clock.timezones.index(st.timezone)
        cloud = rng.beta(2.0, 5.0, n_days)
        mean_d = st.peak_mean_c - seasonal_drop + regional + _ar1(rng, n_days, 0.6, 0.8) - 2.0 * (cloud - 0.3)
        amp_d = st.diurnal_amplitude_c * (1.0 - 0.45 * cloud) * rng.uniform(0.9, 1.1, n_days)
        temp[j], irr[j] = station_hours(
            rng, clock, k, mean_d, amp_d, cloud, noise_sd=0.25, warmest_hour=16.0, sun=(6.5, 14.0, 0.85, 0.65)
        )
    return _published(params, temp, irr)


def day_of_year(params: SimParams) -> tuple[int, np.ndarray]:
    """The number of simulated days (the span plus a day either side) and each one's day of the year."""
    n_days = params.days + 2
    day_ord = params.start.toordinal() - 1 + np.arange(n_days)
    return n_days, np.array([datetime.fromordinal(int(o)).timetuple().tm_yday for o in day_ord])


def add_spells(
    rng: np.random.Generator,
    regional: np.ndarray,
    days: int,
    spells: tuple[tuple[float, float, tuple[int, int], tuple[float, float]], ...],
) -> None:
    """Add warm or cold spells to the regional daily anomaly, in place.

    Each spell kind is (sign, mean days between spells, (shortest, longest + 1) days,
    (smallest, largest) depth °C); a spell rises and falls as half a sine.
    """
    n_days = len(regional)
    for sign, per_days, dur, amp in spells:
        for _ in range(rng.poisson(days / per_days)):
            first, length = rng.integers(0, n_days), rng.integers(*dur)
            bump = np.sin(np.pi * (np.arange(length) + 0.5) / length) * rng.uniform(*amp)
            stop = min(n_days, first + length)
            regional[first:stop] += sign * bump[: stop - first]


def station_hours(
    rng: np.random.Generator,
    clock: Clock,
    k: int,
    mean_d: np.ndarray,
    amp_d: np.ndarray,
    cloud: np.ndarray,
    noise_sd: float,
    warmest_hour: float,
    sun: tuple[float, float, float, float],
) -> tuple[np.ndarray, np.ndarray]:
    """One station's hourly temperature (°C) and irradiance (kW/m²) from its daily mean and swing.

    ``sun`` is (sunrise local hour, hours of daylight, clear-sky peak kW/m², share cut
    by a fully clouded day).
    """
    n_days = len(mean_d)
    hour = clock.local_hour[k].astype(float)
    day = clock.local_day[k] + 1
    x = day + hour / 24.0
    centers = np.arange(n_days) + 0.5
    mean_h = np.interp(x, centers, mean_d)
    amp_h = np.interp(x, centers, amp_d)
    noise = _ar1(rng, clock.n_hours + 1, 0.9, noise_sd)
    temp = mean_h + amp_h * np.cos(2 * np.pi * (hour - warmest_hour) / 24.0) + noise
    rise, length, peak, cloud_cut = sun
    clear = (
        np.clip(np.sin(np.pi * (hour - rise) / length), 0.0, None) * (hour >= rise) * (hour <= rise + length)
    )
    return temp, peak * clear * (1.0 - cloud_cut * cloud[np.clip(day, 0, n_days - 1)])


def _published(params: SimParams, temp: np.ndarray, irr: np.ndarray) -> Weather:
    """Round each station's temperatures to 0.1 in its unit, and read them back as °C."""
    published = np.empty_like(temp)
    temp_c = np.empty_like(temp)
    for j, st in enumerate(params.stations):
        if st.unit == "f":
            published[j] = np.round(temp[j] * 9.0 / 5.0 + 32.0, 1)
            temp_c[j] = (published[j] - 32.0) * 5.0 / 9.0
        else:
            published[j] = np.round(temp[j], 1)
            temp_c[j] = published[j]
    return Weather(temp_c, published, irr)


def _ar1(rng: np.random.Generator, n: int, phi: float, sd: float) -> np.ndarray:
    """A stationary AR(1) series with marginal standard deviation ``sd``."""
    eps = rng.normal(0.0, sd * np.sqrt(1.0 - phi**2), n)
    out = np.empty(n)
    out[0] = rng.normal(0.0, sd)
    for i in range(1, n):
        out[i] = phi * out[i - 1] + eps[i]
    return out


@dataclass(frozen=True)
class Tariffs:
    """Price and price tier of every grid hour, per plan and time zone."""

    plan_ids: tuple[str, ...]
    """Rate plan identifiers, indexed by the first axis."""
    price: np.ndarray
    """USD per kWh, (n_plans, n_tz, n_hours + 1)."""
    tier: np.ndarray
    """Dense rank of the price among the plan's distinct prices, 0 cheapest, (n_plans, n_tz, n_hours + 1)."""


def _months(spec: str) -> tuple[int, int]:
    lo, _, hi = spec.partition("-")
    return int(lo), int(hi or lo)


def build_tariffs(params: SimParams, clock: Clock) -> Tariffs:
    """Evaluate each plan's rows on every local hour; the tier is the plan-wide dense price rank."""
    ids = tuple(p for p, _ in params.plans)
    price = np.full((len(ids), len(clock.timezones), clock.n_hours + 1), np.nan)
    tier = np.zeros(price.shape, dtype=np.int64)
    for p, (_, rows) in enumerate(params.plans):
        for row in rows:
            lo, hi = _months(row.months)
            hit = (
                (clock.month >= lo)
                & (clock.month <= hi)
                & (clock.weekend == (row.day_type == "weekend"))
                & (clock.local_hour >= row.start_hour)
                & (clock.local_hour < row.end_hour)
            )
            price[p][hit] = row.price_per_kwh
        distinct = np.unique([r.price_per_kwh for r in rows])
        tier[p] = np.searchsorted(distinct, price[p])
    if np.isnan(price).any():
        raise SimulationError("a rate plan leaves some local hours without a price; check its rows")
    return Tariffs(ids, price, tier)


@dataclass(frozen=True)
class Homes:
    """Per-premise attributes and thermal parameters, arrays of shape (n_premises,)."""

    premise_id: np.ndarray
    """Identifiers "P0001", ..."""
    index: np.ndarray
    """Position of the premise in the whole lake, the key of its random streams."""
    station: np.ndarray
    """Index into ``SimParams.stations``."""
    tz: np.ndarray
    """Index into ``Clock.timezones``."""
    plan: np.ndarray
    """Index into ``SimParams.plans``."""
    presence: np.ndarray
    """Whether the thermostat senses occupancy."""
    comfort_cool_c: np.ndarray
    """Cooling comfort setpoint, whole °C."""
    comfort_heat_c: np.ndarray
    """Heating comfort setpoint, whole °C."""
    floor_area_m2: np.ndarray
    """Conditioned floor area, m²."""
    r_k_per_kw: np.ndarray
    """Envelope thermal resistance, K/kW."""
    c_kwh_per_k: np.ndarray
    """Lumped heat capacity of air, furnishings and structure, kWh/K."""
    capacity_kw: np.ndarray
    """Rated thermal cooling capacity at 35 °C outdoors, kW."""
    cop_nominal: np.ndarray
    """Coefficient of performance at 27.8 °C (82 °F) outdoors."""
    fan_kw: np.ndarray
    """Indoor fan electric power while the compressor runs, kW."""
    solar_aperture_m2: np.ndarray
    """Effective glazing area turning irradiance into indoor heat, m²."""
    base_kw: np.ndarray
    """Average non-HVAC electric load, kW."""
    depth_pref: np.ndarray
    """Habitual setback depth of the residents, whole °C."""
    keenness: np.ndarray
    """Per-home propensity to set back, logit units."""
    restore_lead: np.ndarray
    """Decisions before the last one at which the residents restore comfort (0 or 1)."""


@dataclass(frozen=True)
class Days:
    """Per-premise, per-local-day draws, arrays of shape (n_premises, days)."""

    away: np.ndarray
    """Residents leave that day."""
    depart_min: np.ndarray
    """Local minute of departure after midnight."""
    return_min: np.ndarray
    """Local minute of return after midnight."""
    feeling_hot: np.ndarray
    """Hidden 'feeling hot' state (all false unless the hidden confounder is on)."""


@dataclass(frozen=True)
class World:
    """All exogenous draws of one lake."""

    params: SimParams
    """Parameters the world was drawn from."""
    clock: Clock
    """Time grid."""
    weather: Weather
    """Station weather."""
    tariffs: Tariffs
    """Prices per hour."""
    homes: Homes
    """Premise attributes."""
    days: Days
    """Daily occupancy."""
    base_kwh: np.ndarray
    """Non-HVAC energy per 15-minute interval, kWh, (4 * n_hours, n_premises)."""
    estimated: np.ndarray
    """Meter intervals flagged "estimated", (4 * n_hours, n_premises)."""
    heating: HeatingSystems | None = None
    """Each home's heating system in the heating season; None in summer."""


def _base_shape(hour: np.ndarray, occupied: np.ndarray) -> np.ndarray:
    """Relative non-HVAC load by local hour: evening peak at home, low when away."""
    home = np.select([hour < 6, hour < 9, hour < 17, hour < 22], [0.7, 1.2, 1.0, 1.5], default=1.0)
    return np.where(occupied, home, 0.55)


@dataclass(frozen=True)
class Shared:
    """The draws every premise of a lake shares: the time grid, station weather and prices."""

    clock: Clock
    """Time grid."""
    weather: Weather
    """Station weather."""
    tariffs: Tariffs
    """Prices per hour."""


def build_shared(params: SimParams) -> Shared:
    """Draw the lake-wide quantities once, so chunks of premises can share them."""
    clock = build_clock(params)
    return Shared(clock, build_weather(params, clock), build_tariffs(params, clock))


def build_world(params: SimParams, premises: range | None = None, shared: Shared | None = None) -> World:
    """Draw every exogenous quantity of a lake, or of the premises in ``premises`` only, from the seed.

    A premise's draws come from its own stream, so the world of a slice of
    premises holds the very homes the whole lake has at those positions.
    """
    premises = range(params.n_premises) if premises is None else premises
    if premises.step != 1 or premises.start < 0 or premises.stop > params.n_premises:
        raise SimulationError(f"premises {premises} is not a slice of the {params.n_premises} in the lake")
    shared = shared or build_shared(params)
    clock, weather, tariffs = shared.clock, shared.weather, shared.tariffs
    n, nd = len(premises), params.days
    n_q = 4 * clock.n_hours
    shares = np.array([s.share for s in params.stations])
    cols: dict[str, list] = {name: [] for name in Homes.__dataclass_fields__}
    away = np.zeros((n, nd), dtype=bool)
    dep = np.zeros((n, nd), dtype=np.int64)
    ret = np.zeros((n, nd), dtype=np.int64)
    hot = np.zeros((n, nd), dtype=bool)
    noise = np.empty((n_q, n))
    estimated = np.empty((n_q, n), dtype=bool)
    weekday_of_day = np.array(
        [datetime.fromordinal(params.start.toordinal() + d).weekday() < 5 for d in range(nd)]
    )
    for row, i in enumerate(premises):
        rng = stream(params.seed, STREAM_PREMISE, i)
        station = int(rng.choice(len(shares), p=shares / shares.sum()))
        area = float(np.clip(np.round(rng.lognormal(np.log(160.0), 0.3)), 80, 320))
        ua = 0.0013 * area * rng.uniform(0.75, 1.35)
        tau = rng.uniform(20.0, 60.0)
        aperture = 0.011 * area * rng.uniform(0.7, 1.3)
        base_kw = 0.25 + 0.0025 * area * rng.uniform(0.6, 1.4)
        comfort = int(rng.choice([22, 23, 24, 25], p=[0.15, 0.35, 0.35, 0.15]))
        design = ua * (38.0 - comfort) + 0.8 * base_kw * 1.5 + 0.6 * aperture
        capacity = round(design * rng.uniform(1.15, 1.5), 1)
        cols["premise_id"].append(f"P{i + 1:04d}")
        cols["index"].append(i)
        cols["station"].append(station)
        cols["tz"].append(clock.timezones.index(params.stations[station].timezone))
        cols["plan"].append(0 if rng.random() < params.share_tou else 1)
        # A golden-ratio sequence spreads the homes without sensing evenly over any premise count.
        cols["presence"].append(bool((i * 0.6180339887498949 + 0.5) % 1.0 >= params.share_without_presence))
        cols["comfort_cool_c"].append(comfort)
        cols["comfort_heat_c"].append(int(rng.integers(19, 22)))
        cols["floor_area_m2"].append(area)
        cols["r_k_per_kw"].append(1.0 / ua)
        cols["c_kwh_per_k"].append(tau * ua)
        cols["capacity_kw"].append(capacity)
        cols["cop_nominal"].append(rng.uniform(3.0, 4.2))
        cols["fan_kw"].append(0.04 * capacity)
        cols["solar_aperture_m2"].append(aperture)
        cols["base_kw"].append(base_kw)
        cols["depth_pref"].append(int(rng.choice([1, 2, 3], p=params.depth_pref_probs)))
        cols["keenness"].append(rng.normal(0.0, 0.4))
        p_away = np.where(weekday_of_day, rng.uniform(*params.weekday_away_prob), params.weekend_away_prob)
        away[row] = rng.random(nd) < p_away
        dep[row] = _off_the_hour(np.floor(60 * rng.uniform(*params.depart_window_h, nd)).astype(np.int64))
        ret[row] = _off_the_hour(np.floor(60 * rng.uniform(*params.return_window_h, nd)).astype(np.int64))
        hot_draw = rng.random(nd) < params.hidden_hot_prob
        hot[row] = hot_draw & params.hidden_confounder
        sd = 0.3
        noise[:, row] = rng.lognormal(-sd * sd / 2.0, sd, n_q)
        estimated[:, row] = rng.random(n_q) < params.share_estimated
        cols["restore_lead"].append(int(rng.random() < params.early_restore_share))
    homes = Homes(**{k: np.asarray(v) for k, v in cols.items()})
    days = Days(away, dep, ret, hot)
    occ_q = quarter_occupied(clock, homes, days)
    hour_q = np.repeat(np.arange(clock.n_hours), 4)
    local_hour_q = clock.local_hour[:, hour_q][homes.tz].T
    hot_q = _daily_to_quarter(clock, homes, days.feeling_hot)
    shape = _base_shape(local_hour_q, occ_q) * (1.0 + 0.2 * hot_q)
    base_kwh = homes.base_kw[None, :] * shape * noise * 0.25
    systems = None
    if params.heating_season:
        from pipeline.simulate.heating import draw_systems

        systems = draw_systems(params, homes.index, homes.r_k_per_kw, homes.comfort_heat_c)
    return World(params, clock, weather, tariffs, homes, days, base_kwh, estimated, systems)


def _off_the_hour(minutes: np.ndarray) -> np.ndarray:
    """Move comings and goings off hh:00, which belongs to the setpoint decisions."""
    return minutes + (minutes % 60 == 0)


def local_day_of_hour(clock: Clock, homes: Homes) -> tuple[np.ndarray, np.ndarray]:
    """Local day and local hour of every grid hour per premise, each (n_hours, n_premises)."""
    day = clock.local_day[:, : clock.n_hours][homes.tz].T
    hour = clock.local_hour[:, : clock.n_hours][homes.tz].T
    return day, hour


def away_window(clock: Clock, homes: Homes, days: Days) -> tuple[np.ndarray, np.ndarray]:
    """Unoccupied minutes [from, to) within each grid hour per premise, each (n_hours, n_premises)."""
    day, hour = local_day_of_hour(clock, homes)
    valid = (day >= 0) & (day < days.away.shape[1])
    d = np.clip(day, 0, days.away.shape[1] - 1)
    idx = np.arange(days.away.shape[0])[None, :]
    is_away = valid & days.away[idx, d]
    lo = np.clip(days.depart_min[idx, d] - 60 * hour, 0, 60)
    hi = np.clip(days.return_min[idx, d] - 60 * hour, 0, 60)
    empty = ~is_away | (hi <= lo)
    return np.where(empty, 0, lo), np.where(empty, 0, hi)


def quarter_occupied(clock: Clock, homes: Homes, days: Days) -> np.ndarray:
    """Whether residents are home at the start of each 15-minute interval, (4 * n_hours, n_premises)."""
    lo, hi = away_window(clock, homes, days)
    minute = np.tile(np.array([0, 15, 30, 45]), clock.n_hours)[:, None]
    lo_q, hi_q = np.repeat(lo, 4, axis=0), np.repeat(hi, 4, axis=0)
    return ~((minute >= lo_q) & (minute < hi_q))


def _daily_to_quarter(clock: Clock, homes: Homes, daily: np.ndarray) -> np.ndarray:
    day, _ = local_day_of_hour(clock, homes)
    valid = (day >= 0) & (day < daily.shape[1])
    d = np.clip(day, 0, daily.shape[1] - 1)
    per_hour = valid & daily[np.arange(daily.shape[0])[None, :], d]
    return np.repeat(per_hour, 4, axis=0)
