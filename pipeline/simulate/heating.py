"""The heating season: gas furnaces and air-source heat pumps, winter weather with cold snaps.

Each winter home has one heating system, drawn from its own stream (so the summer
draws of the same seed are untouched):

* a **gas furnace** of fixed thermal output and fixed efficiency (fuel to heat);
  the electricity meter sees only its blower fan, so the gas it burns is kept in
  ``truth/`` and never reaches a landing file;
* an **air-source heat pump** whose thermal capacity and coefficient of
  performance (COP) fall as it gets colder outdoors (``heat_pump_capacity``,
  ``heat_pump_cop``, both linear in the outdoor temperature and clipped to the
  ranges ``HeatingParams`` states), plus electric resistance back-up that is
  enabled only below the home's balance point (the outdoor temperature at which
  the heat pump alone just carries the home at comfort) and supplies the shortfall.

The node is the same lumped RC model as in summer (``physics``):
C dT/dt = (T_out - T) / R + Q_gains + Q_heat, advanced over a sub-step by the
exact exponential solution; the thermostat calls for heat with hysteresis of
+/- ``deadband_c``. All functions are vectorised across homes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.simulate.params import HeatingParams, SimParams
from pipeline.simulate.physics import integrate, rc_step
from pipeline.simulate.world import Clock, _ar1, add_spells, day_of_year, station_hours, stream

STREAM_HEATING = 3
"""Stream key of each premise's heating-system draws (the summer streams are 0 to 2)."""

RATING_C = 8.3
"""Outdoor temperature of the heat pump's rated capacity and COP, °C (47 °F, common practice)."""


@dataclass(frozen=True)
class HeatingSystems:
    """Per-premise heating systems, arrays of shape (n_premises,)."""

    heat_pump: np.ndarray
    """True for an air-source heat pump, false for a gas furnace."""
    capacity_kw: np.ndarray
    """Furnace: thermal output; heat pump: thermal capacity at RATING_C outdoors, kW."""
    cop_rated: np.ndarray
    """Heat pump COP at RATING_C outdoors (NaN for furnaces)."""
    balance_c: np.ndarray
    """Heat pump balance point, °C outdoors: below it the resistance back-up may run (NaN for furnaces)."""
    backup_kw: np.ndarray
    """Resistance back-up heater output (= electric draw), kW (0 for furnaces)."""
    efficiency: np.ndarray
    """Furnace efficiency, heat delivered per unit of fuel energy (NaN for heat pumps)."""
    fan_kw: np.ndarray
    """Indoor blower electric power while heating, kW."""


def heat_pump_cop(cop_rated: np.ndarray, t_out_c: np.ndarray, hp: HeatingParams) -> np.ndarray:
    """Heating COP: ``cop_slope`` of the rated COP lost per °C below RATING_C, clipped to ``cop_share``."""
    lo, hi = hp.cop_share
    return cop_rated * np.clip(1.0 + hp.cop_slope * (np.asarray(t_out_c) - RATING_C), lo, hi)


def heat_pump_capacity(capacity_kw: np.ndarray, t_out_c: np.ndarray, hp: HeatingParams) -> np.ndarray:
    """Thermal capacity: ``capacity_slope`` of the rated one lost per °C below RATING_C, clipped."""
    lo, hi = hp.capacity_share
    return capacity_kw * np.clip(1.0 + hp.capacity_slope * (np.asarray(t_out_c) - RATING_C), lo, hi)


def draw_systems(
    params: SimParams, index: np.ndarray, r_k_per_kw: np.ndarray, comfort_c: np.ndarray
) -> HeatingSystems:
    """Each premise's heating system from its own heating stream, sized to its envelope and comfort.

    A heat pump's rated capacity is chosen so that its balance point (capacity at
    T_out equal to the conduction load (comfort - T_out) / R) is the drawn one;
    the back-up covers the conduction load at ``design_c`` on its own. A furnace
    covers that load with a drawn margin.
    """
    hp = params.heating
    n = len(index)
    cols = {name: np.empty(n) for name in HeatingSystems.__dataclass_fields__}
    cols["heat_pump"] = np.zeros(n, dtype=bool)
    for row, i in enumerate(index):
        rng = stream(params.seed, STREAM_HEATING, int(i))
        ua = 1.0 / r_k_per_kw[row]
        design_load = ua * (comfort_c[row] - hp.design_c)
        is_hp = bool(rng.random() < hp.heat_pump_share)
        if is_hp:
            balance = rng.uniform(*hp.balance_c)
            share = 1.0 + hp.capacity_slope * (balance - RATING_C)
            capacity = ua * (comfort_c[row] - balance) / share
            cols["cop_rated"][row] = rng.uniform(*hp.cop_rated)
            cols["balance_c"][row] = balance
            cols["backup_kw"][row] = round(design_load, 1)
            cols["efficiency"][row] = np.nan
            cols["fan_kw"][row] = hp.heat_pump_fan_kw_per_kw * capacity
        else:
            capacity = design_load * rng.uniform(*hp.furnace_margin)
            cols["cop_rated"][row] = np.nan
            cols["balance_c"][row] = np.nan
            cols["backup_kw"][row] = 0.0
            cols["efficiency"][row] = rng.uniform(*hp.furnace_efficiency)
            cols["fan_kw"][row] = rng.uniform(*hp.furnace_fan_kw)
        cols["heat_pump"][row] = is_hp
        cols["capacity_kw"][row] = capacity
    return HeatingSystems(**cols)


def substep(
    r_k_per_kw: np.ndarray,
    c_kwh_per_k: np.ndarray,
    systems: HeatingSystems,
    hp: HeatingParams,
    t_in_c: np.ndarray,
    running: np.ndarray,
    t_out_c: np.ndarray,
    gains_kw: np.ndarray,
    setpoint_c: np.ndarray,
    dt_h: float,
    deadband_c: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Advance every home by one sub-step of heating.

    Returns the new indoor temperature (°C), whether heat was called for, the heat
    delivered (kW thermal), the electric draw (kW: heat pump compressor, resistance
    back-up, blower) and the fuel burnt (kW of gas energy, furnaces only).
    """
    running = (t_in_c < setpoint_c - deadband_c) | (running & (t_in_c < setpoint_c + deadband_c))
    is_hp = systems.heat_pump
    q_pump = np.where(running & is_hp, heat_pump_capacity(systems.capacity_kw, t_out_c, hp), 0.0)
    # The back-up supplies what the heat pump lacks to lift the home 1 K above its setpoint.
    shortfall = (setpoint_c + 1.0 - t_out_c) / r_k_per_kw - q_pump
    enabled = running & is_hp & (t_out_c < systems.balance_c)
    q_backup = np.where(enabled, np.clip(shortfall, 0.0, systems.backup_kw), 0.0)
    q_furnace = np.where(running & ~is_hp, systems.capacity_kw, 0.0)
    q_heat = q_pump + q_backup + q_furnace
    t_new = rc_step(t_in_c, t_out_c, r_k_per_kw, c_kwh_per_k, gains_kw + q_heat, dt_h)
    cop = np.where(is_hp, heat_pump_cop(np.where(is_hp, systems.cop_rated, 1.0), t_out_c, hp), 1.0)
    electric = q_pump / cop + q_backup + np.where(running, systems.fan_kw, 0.0)
    fuel = np.where(is_hp, 0.0, q_furnace / np.where(is_hp, 1.0, systems.efficiency))
    return t_new, running, q_heat, electric, fuel


def run(
    r_k_per_kw: np.ndarray,
    c_kwh_per_k: np.ndarray,
    systems: HeatingSystems,
    t_in0_c: np.ndarray,
    t_out_c: np.ndarray,
    gains_kw: np.ndarray,
    setpoint_c: np.ndarray,
    dt_h: float,
    deadband_c: float = 0.5,
    hp: HeatingParams | None = None,
) -> dict[str, np.ndarray]:
    """Integrate homes over given inputs, each (n_steps, n_homes); for tests and what-if runs.

    Returns ``t_in_c`` (n_steps + 1, n_homes), ``q_heat_kw``, ``electric_kw``, ``fuel_kw``
    and ``running`` (n_steps, n_homes).
    """
    hp = hp or HeatingParams()

    def step(t_in, state, t_out, gains, setpoint):
        return substep(
            r_k_per_kw, c_kwh_per_k, systems, hp, t_in, state, t_out, gains, setpoint, dt_h, deadband_c
        )

    return integrate(step, t_in0_c, t_out_c, gains_kw, setpoint_c, ("q_heat_kw", "electric_kw", "fuel_kw"))


def build_winter_weather(
    params: SimParams, clock: Clock, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """Invent cold winters: a seasonal low, shared cold snaps and thaws, clouds, a damped diurnal cycle.

    Returns (temperature °C, irradiance kW/m²), each (n_stations, n_hours + 1); the
    caller rounds and publishes them as in summer.
    """
    hp = params.heating
    n_days, doy = day_of_year(params)
    # Coldest around January 20; the mean rises by up to 2 * seasonal_rise_c over the year.
    seasonal_rise = hp.seasonal_rise_c * (1.0 - np.cos(2 * np.pi * (doy - 20) / 365.0))
    regional = _ar1(rng, n_days, phi=0.8, sd=2.5)
    add_spells(
        rng,
        regional,
        params.days,
        ((-1.0, hp.cold_snap_every_days, (3, 8), hp.cold_snap_depth_c), (1.0, 40.0, (2, 6), (3.0, 6.0))),
    )
    n_st = len(params.stations)
    temp = np.zeros((n_st, clock.n_hours + 1))
    irr = np.zeros_like(temp)
    for j, st in enumerate(params.stations):
        k = clock.timezones.index(st.timezone)
        cloud = rng.beta(3.0, 3.0, n_days)
        local = _ar1(rng, n_days, 0.6, 1.0) - 2.0 * (cloud - 0.5)
        mean_d = st.winter_mean_c + seasonal_rise + regional + local
        amp_d = 0.7 * st.diurnal_amplitude_c * (1.0 - 0.5 * cloud) * rng.uniform(0.9, 1.1, n_days)
        temp[j], irr[j] = station_hours(
            rng, clock, k, mean_d, amp_d, cloud, noise_sd=0.3, warmest_hour=14.5, sun=(7.5, 9.0, 0.6, 0.7)
        )
    return temp, irr
