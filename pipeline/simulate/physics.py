"""Lumped resistance-capacitance (RC) thermal model of a home with an on/off air conditioner.

One node per home: C dT/dt = (T_out - T) / R + Q_gains - Q_cool, with R in K/kW,
C in kWh/K and heat flows in kW. Over one sub-step the inputs are held constant
and the node is advanced by the exact exponential solution, so a home with the
air conditioner off relaxes toward T_out + R * Q_gains with time constant R * C.
The thermostat switches the compressor with hysteresis of +/- ``deadband_c``;
capacity falls and the coefficient of performance (COP) falls as it gets hotter
outdoors. All functions are vectorised across homes (arrays of shape (n_homes,)).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class ThermalHomes:
    """Thermal parameters of a set of homes, arrays of shape (n_homes,)."""

    r_k_per_kw: np.ndarray
    """Envelope thermal resistance, K/kW."""
    c_kwh_per_k: np.ndarray
    """Lumped heat capacity, kWh/K."""
    capacity_kw: np.ndarray
    """Rated thermal cooling capacity at 35 °C outdoors, kW."""
    cop_nominal: np.ndarray
    """Coefficient of performance at 27.8 °C outdoors."""
    fan_kw: np.ndarray
    """Fan electric power while running, kW."""


def cop(cop_nominal: np.ndarray, t_out_c: np.ndarray) -> np.ndarray:
    """Coefficient of performance: 2.5 % lower per °C above 27.8 °C outdoors, bounded."""
    return cop_nominal * np.clip(1.0 - 0.025 * (t_out_c - 27.8), 0.45, 1.25)


def available_capacity(capacity_kw: np.ndarray, t_out_c: np.ndarray) -> np.ndarray:
    """Thermal capacity at the given outdoor temperature: 0.8 % less per °C above 35 °C, bounded."""
    return capacity_kw * np.clip(1.0 - 0.008 * (t_out_c - 35.0), 0.8, 1.1)


def substep(
    homes: ThermalHomes,
    t_in_c: np.ndarray,
    running: np.ndarray,
    t_out_c: np.ndarray,
    gains_kw: np.ndarray,
    setpoint_c: np.ndarray,
    dt_h: float,
    deadband_c: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Advance every home by one sub-step.

    Returns the new indoor temperature (°C), whether the compressor ran during the
    step, the heat it removed (kW thermal) and its electric draw (kW).
    """
    running = (t_in_c > setpoint_c + deadband_c) | (running & (t_in_c > setpoint_c - deadband_c))
    q_cool = np.where(running, available_capacity(homes.capacity_kw, t_out_c), 0.0)
    t_new = rc_step(t_in_c, t_out_c, homes.r_k_per_kw, homes.c_kwh_per_k, gains_kw - q_cool, dt_h)
    electric = q_cool / cop(homes.cop_nominal, t_out_c) + np.where(running, homes.fan_kw, 0.0)
    return t_new, running, q_cool, electric


def run(
    homes: ThermalHomes,
    t_in0_c: np.ndarray,
    t_out_c: np.ndarray,
    gains_kw: np.ndarray,
    setpoint_c: np.ndarray,
    dt_h: float,
    deadband_c: float = 0.5,
) -> dict[str, np.ndarray]:
    """Integrate homes over given inputs, each (n_steps, n_homes); for tests and what-if runs.

    Returns ``t_in_c`` (n_steps + 1, n_homes), ``q_cool_kw``, ``electric_kw`` and
    ``running`` (n_steps, n_homes).
    """

    def step(t_in, state, t_out, gains, setpoint):
        return substep(homes, t_in, state, t_out, gains, setpoint, dt_h, deadband_c)

    return integrate(step, t_in0_c, t_out_c, gains_kw, setpoint_c, ("q_cool_kw", "electric_kw"))


def rc_step(
    t_in_c: np.ndarray,
    t_out_c: np.ndarray,
    r_k_per_kw: np.ndarray,
    c_kwh_per_k: np.ndarray,
    net_gain_kw: np.ndarray,
    dt_h: float,
) -> np.ndarray:
    """The exact step of the lumped RC model over ``dt_h`` with constant inputs.

    C dT/dt = (T_out - T) / R + Q: T relaxes to T_eq = T_out + R Q with time constant R C.
    """
    t_eq = t_out_c + r_k_per_kw * net_gain_kw
    return t_eq + (t_in_c - t_eq) * np.exp(-dt_h / (r_k_per_kw * c_kwh_per_k))


def integrate(step, t_in0_c, t_out_c, gains_kw, setpoint_c, flows: tuple[str, ...]) -> dict[str, np.ndarray]:
    """Run ``step(t_in, running, t_out, gains, setpoint) -> (t_new, running, *flows)`` over the inputs.

    Inputs are (n_steps, n_homes); returns ``t_in_c`` (n_steps + 1, n_homes), one
    (n_steps, n_homes) array per name in ``flows`` and ``running``.
    """
    n_steps, n_homes = np.shape(t_out_c)
    t_in = np.empty((n_steps + 1, n_homes))
    t_in[0] = t_in0_c
    out = {name: np.empty((n_steps, n_homes)) for name in flows}
    on = np.zeros((n_steps, n_homes), dtype=bool)
    state = np.zeros(n_homes, dtype=bool)
    for k in range(n_steps):
        t_in[k + 1], state, *values = step(t_in[k], state, t_out_c[k], gains_kw[k], setpoint_c[k])
        for name, value in zip(flows, values, strict=True):
            out[name][k] = value
        on[k] = state
    return {"t_in_c": t_in, **out, "running": on}
