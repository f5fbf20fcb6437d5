"""Physics of the heating season: energy balance, heat pump COP and capacity, degree-hours, setbacks."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.features import StateSpace
from pipeline.simulate import heating
from pipeline.simulate.params import HeatingParams, winter_params

HP = HeatingParams()
PER_HOUR = 12


def _homes(n: int, seed: int, heat_pump_share: float):
    """n homes with drawn envelopes (R 3..7 K/kW, time constant 20..60 h) and heating systems."""
    rng = np.random.default_rng(seed)
    r = rng.uniform(3.0, 7.0, n)
    c = rng.uniform(20.0, 60.0, n) / r
    params = winter_params(seed=seed, heating=HeatingParams(heat_pump_share=heat_pump_share))
    systems = heating.draw_systems(params, np.arange(n), r, np.full(n, 20.0))
    return r, c, systems


def _winter(days: int, seed: int, lo: float = -15.0, hi: float = 8.0) -> tuple[np.ndarray, np.ndarray]:
    """Outdoor °C and clear-sky shape per sub-step: daily means lo..hi °C, swing +/- 4 °C."""
    rng = np.random.default_rng(seed)
    hours = np.arange(days * 24 * PER_HOUR) / PER_HOUR
    mean = np.repeat(rng.uniform(lo, hi, days), 24 * PER_HOUR)
    t_out = mean + 4.0 * np.cos(2 * np.pi * (hours % 24 - 14.5) / 24.0)
    sun = np.clip(np.sin(np.pi * (hours % 24 - 7.5) / 9.0), 0.0, None)
    return t_out, sun


def _run(r, c, systems, t_out, gains, setpoint):
    n = len(r)
    outdoor = np.repeat(t_out[:, None], n, 1)
    return heating.run(r, c, systems, np.full(n, 20.0), outdoor, gains, setpoint, 1 / PER_HOUR, hp=HP)


@pytest.mark.parametrize("heat_pump_share", [0.0, 1.0], ids=["gas furnaces", "heat pumps"])
def test_thermal_energy_balance_closes_over_two_winter_days(heat_pump_share):
    """Stored heat change = gains + heating - conduction over two days, within 1 % of the heat delivered.

    C dT/dt = (T_out - T) / R + Q_gains + Q_heat (lumped RC model); conduction is
    integrated by the trapezoid rule over 5-minute steps.
    """
    r, c, systems = _homes(12, 1, heat_pump_share)
    t_out, sun = _winter(2, 1)
    steps = len(t_out)
    gains = 0.6 + 1.0 * sun[:, None]
    hour = (np.arange(steps) // PER_HOUR) % 24
    setpoint = np.where((hour >= 9) & (hour < 17), 17.0, 20.0)[:, None] + np.zeros((steps, 12))
    out = _run(r, c, systems, t_out, gains, setpoint)
    dt = 1 / PER_HOUR
    t_in = out["t_in_c"]
    conduction = ((0.5 * (t_in[1:] + t_in[:-1]) - t_out[:, None]) / r * dt).sum(axis=0)
    heat = (out["q_heat_kw"] * dt).sum(axis=0)
    stored = c * (t_in[-1] - t_in[0])
    residual = stored - ((gains * dt).sum(axis=0) + heat - conduction)
    assert (heat > 20.0).all()
    assert np.abs(residual / heat).max() < 0.01


def test_heat_pump_cop_and_capacity_fall_with_the_cold_within_their_stated_ranges():
    """COP and capacity never rise as it gets colder, and stay inside the bounds HeatingParams states.

    The COP of every drawn heat pump lies in cop_share[0] * cop_rated[0] .. cop_share[1] *
    cop_rated[1] (1.26 .. 4.32) from -35 °C to +25 °C; at the 8.3 °C (47 °F) rating
    point it is the rated COP.
    """
    _, _, systems = _homes(400, 2, 1.0)
    t = np.linspace(-35.0, 25.0, 241)[:, None]
    cop = heating.heat_pump_cop(systems.cop_rated[None, :], t, HP)
    cap = heating.heat_pump_capacity(systems.capacity_kw[None, :], t, HP)
    assert (np.diff(cop, axis=0) >= 0).all() and (np.diff(cap, axis=0) >= 0).all()
    assert (cop[0] < cop[-1]).all() and (cap[0] < cap[-1]).all()
    lo, hi = HP.cop_share[0] * HP.cop_rated[0], HP.cop_share[1] * HP.cop_rated[1]
    assert cop.min() >= lo - 1e-12 and cop.max() <= hi + 1e-12
    assert lo > 1.0, "a heat pump below COP 1 would be worse than its resistance back-up"
    assert ((systems.cop_rated >= HP.cop_rated[0]) & (systems.cop_rated <= HP.cop_rated[1])).all()
    at_rating = heating.heat_pump_cop(systems.cop_rated, heating.RATING_C, HP)
    np.testing.assert_allclose(at_rating, systems.cop_rated)


def test_heat_pump_carries_the_home_alone_exactly_at_its_balance_point():
    """At the balance point, capacity equals the conduction load at comfort: (20 - T_bal) / R."""
    r, _, systems = _homes(50, 3, 1.0)
    cap = heating.heat_pump_capacity(systems.capacity_kw, systems.balance_c, HP)
    np.testing.assert_allclose(cap, (20.0 - systems.balance_c) / r, rtol=1e-12)
    assert ((systems.balance_c >= HP.balance_c[0]) & (systems.balance_c <= HP.balance_c[1])).all()


def test_resistance_back_up_runs_only_below_the_balance_point_and_a_furnace_shows_only_its_fan():
    """Electric draw beyond compressor and fan appears only below the balance point; a furnace's meter
    sees fan_kw while it fires and its gas is heat / efficiency."""
    r, c, systems = _homes(16, 4, 0.5)
    t_out, sun = _winter(6, 4, lo=-18.0, hi=6.0)
    steps, n = len(t_out), len(r)
    out = _run(r, c, systems, t_out, 0.5 + sun[:, None], np.full((steps, n), 20.0))
    outdoor = np.repeat(t_out[:, None], n, 1)
    hp, on = systems.heat_pump, out["running"]
    pump = np.where(on & hp, heating.heat_pump_capacity(systems.capacity_kw, outdoor, HP), 0.0)
    cop = heating.heat_pump_cop(np.where(hp, systems.cop_rated, 1.0), outdoor, HP)
    backup = out["electric_kw"] - np.where(hp, pump / cop, 0.0) - np.where(on, systems.fan_kw, 0.0)
    assert (backup[:, hp] > 1e-9).any()
    assert (backup[outdoor >= systems.balance_c] < 1e-9).all()
    furnace = ~hp
    np.testing.assert_allclose(out["electric_kw"][:, furnace], np.where(on, systems.fan_kw, 0.0)[:, furnace])
    np.testing.assert_allclose(
        out["fuel_kw"][:, furnace], out["q_heat_kw"][:, furnace] / systems.efficiency[furnace]
    )
    assert (out["fuel_kw"][:, hp] == 0).all()


def test_daily_heat_pump_energy_rises_with_heating_degree_hours():
    """Daily heat-pump kWh rises with heating degree-hours on base 18.3 °C (65 °F, common practice)."""
    r, c, systems = _homes(6, 5, 1.0)
    days = 40
    t_out, sun = _winter(days, 5)
    steps = len(t_out)
    out = _run(r, c, systems, t_out, 0.6 + 1.0 * sun[:, None], np.full((steps, 6), 20.0))
    kwh = (out["electric_kw"] / PER_HOUR).reshape(days, 24 * PER_HOUR, 6).sum(axis=1)
    hourly_out = t_out[::PER_HOUR]
    hdh = StateSpace().degrees(hourly_out, heating=True).reshape(days, 24).sum(axis=1)
    for j in range(6):
        slope, _ = np.polyfit(hdh, kwh[:, j], 1)
        r2 = np.corrcoef(hdh, kwh[:, j])[0, 1] ** 2
        assert slope > 0 and r2 > 0.8, (slope, r2)


@pytest.mark.parametrize(
    ("heat_pump_share", "quantity"),
    [(0.0, "fuel_kw"), (1.0, "electric_kw")],
    ids=["furnace gas", "heat pump kWh"],
)
def test_night_and_workday_setback_saves_a_plausible_share(heat_pump_share, quantity):
    """A 4 °C (7.2 °F) setback at night (23-07) and over the workday (09-17) saves within a factor 3
    of the rule of thumb.

    Rule of thumb (U.S. Department of Energy consumer guidance, from memory): about 1 %
    of heating energy per °F of setback held for 8 hours a day. Two 8-hour periods of
    7.2 °F make about 14.4 %; the band accepted is 14.4 % / 3 to 14.4 % * 3 = 4.8 % to
    43.2 % of a winter month's heating energy (furnace gas, heat-pump kWh), wide because
    the rule is approximate and our homes and climate are invented.
    """
    r, c, systems = _homes(20, 6, heat_pump_share)
    days = 30
    t_out, sun = _winter(days, 6, lo=-10.0, hi=6.0)
    steps = len(t_out)
    hour = (np.arange(steps) // PER_HOUR) % 24
    gains = 0.6 + 1.0 * sun[:, None]
    comfort = np.full((steps, 20), 20.0)
    away = ((hour >= 23) | (hour < 7) | ((hour >= 9) & (hour < 17)))[:, None]
    setback = comfort - np.where(away, 4.0, 0.0)
    base, saved = (_run(r, c, systems, t_out, gains, sp)[quantity].sum() for sp in (comfort, setback))
    share = 1.0 - saved / base
    print(f"{quantity}: setback saves {share:.1%}")
    assert 0.048 <= share <= 0.432
