"""Episodes, residents' choices, the thermal run over the whole grid, and episode returns.

Decision process (the pipeline cuts episodes the same way, ``sql/step.sql`` with
``decision_points = 'anchored'``):

* An away episode of a premise on a local day is the run of fully unoccupied
  local clock hours h_0 .. h_{n-1} (n >= 1). The return hour h_n is partly away;
  it and the ``recovery_hours`` hours after it form the recovery window.
* Decisions are anchored to events: h_0 (departure), every h_k (k >= 1) whose
  price tier is strictly above that of h_{k-1}, and h_{n-1} (one hour before
  the return hour), without repeats. Step j runs from decision hour d_j up to
  the hour before d_{j+1}; the last step runs through h_{n-1}.
* At d_j:00 the resident picks a_j in ``DEFAULT_ACTIONS`` (°C, raising the
  cooling setpoint is positive); the setpoint sp_j = sp_{j-1} + a_j (sp_{-1} =
  comfort) is held through step j. The last setpoint stays in force until the
  resident walks in during h_n and restores comfort.
* State s_j = StateSpace().encode(local hour of d_j, degrees(outdoor °C
  observed at d_j:00), price tier of d_j, sp_{j-1} - comfort, D - j), D being
  the number of decisions.
* Step reward r_j = -sum over the step's hours of kWh * price, kWh being the
  meter's whole-house reads. The last step also carries the recovery cost and
  the comfort penalty, so the episode return is

      G = -sum_{h in steps and recovery window} kWh_h * price_h - comfort_penalty,
      comfort_penalty = penalty_usd_per_degree_hour * max(0, sp_{D-1} - comfort) * recovery_hours.

  See ``comfort_penalty`` and ``episode_return``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import polars as pl

from pipeline.simulate import physics
from pipeline.simulate.behavior import ACTIONS, allowed, behavior_probs, mask_and_normalise
from pipeline.simulate.params import SimulationError
from pipeline.simulate.world import STREAM_CHOICE, World, away_window, stream

MAX_STEPS = 24


def comfort_penalty(
    final_offset_c: np.ndarray | float, recovery_hours: int = 1, usd_per_degree_hour: float = 0.10
) -> np.ndarray:
    """Comfort penalty of an episode, USD (positive): setback left at return, per recovery hour."""
    return usd_per_degree_hour * np.maximum(0.0, np.asarray(final_offset_c, dtype=float)) * recovery_hours


def episode_return(
    step_cost_usd: np.ndarray | float,
    recovery_cost_usd: np.ndarray | float,
    final_offset_c: np.ndarray | float,
    recovery_hours: int = 1,
    usd_per_degree_hour: float = 0.10,
) -> np.ndarray:
    """Episode return, USD (negative): minus energy cost of step and recovery hours, minus the penalty."""
    return -(
        np.asarray(step_cost_usd, dtype=float)
        + np.asarray(recovery_cost_usd, dtype=float)
        + comfort_penalty(final_offset_c, recovery_hours, usd_per_degree_hour)
    )


@dataclass(frozen=True)
class Episodes:
    """Away episodes of a world, one entry per episode; hour arrays are (n_episodes, MAX_STEPS)."""

    home: np.ndarray
    """Premise index."""
    day: np.ndarray
    """Local day index."""
    n: np.ndarray
    """Fully-away hours."""
    h0: np.ndarray
    """Grid hour of the first fully-away hour."""
    decision: np.ndarray
    """Whether away hour t (t < n) is a decision hour."""

    @property
    def n_decisions(self) -> np.ndarray:
        """Decisions (steps) per episode."""
        return self.decision.sum(axis=1)

    @property
    def step_of_hour(self) -> np.ndarray:
        """Step each away hour belongs to (meaningless where t >= n)."""
        return np.cumsum(self.decision, axis=1) - 1

    @property
    def decision_hour(self) -> np.ndarray:
        """Away hour t of decision j, valid where j < n_decisions (0 elsewhere)."""
        m = len(self.n)
        out = np.zeros((m, MAX_STEPS), dtype=np.int64)
        row, t = np.nonzero(self.decision)
        out[row, self.step_of_hour[row, t]] = t
        return out


def find_episodes(world: World) -> Episodes:
    """Runs of fully-away local hours on each away day and their decision hours.

    Days whose hours fall off the grid are skipped.
    """
    d = world.days
    first = -(-d.depart_min // 60)
    ret_hour = d.return_min // 60
    n = ret_hour - first
    home, day = np.nonzero(d.away & (n >= 1))
    tz = world.homes.tz[home]
    h0 = world.clock.hour_index[tz, day + 1, first[home, day]]
    n_ep = n[home, day]
    keep = (h0 >= 0) & (h0 + n_ep + world.params.recovery_hours < world.clock.n_hours)
    if (n_ep > MAX_STEPS).any():
        raise SimulationError(f"an away episode has more than {MAX_STEPS} steps; shorten the away windows")
    home, day, n_ep, h0 = home[keep], day[keep], n_ep[keep], h0[keep]
    t = np.arange(MAX_STEPS)[None, :]
    inside = t < n_ep[:, None]
    hours = np.where(inside, h0[:, None] + t, 0)
    tier = world.tariffs.tier[world.homes.plan[home][:, None], world.homes.tz[home][:, None], hours]
    rises = np.zeros_like(inside)
    rises[:, 1:] = tier[:, 1:] > tier[:, :-1]
    decision = inside & ((t == 0) | (t == (n_ep - 1)[:, None]) | rises)
    return Episodes(home, day, n_ep, h0, decision)


Chooser = Callable[[np.ndarray, np.ndarray, np.ndarray], np.ndarray]


def table_chooser(world: World, probs: np.ndarray) -> Chooser:
    """Chooser reading a policy table (n_states, n_actions) or per-premise tables (n_premises, ...)."""
    probs = np.asarray(probs, dtype=float)
    if probs.ndim == 2:
        return lambda keys, home, day: probs[keys]
    return lambda keys, home, day: probs[home, keys]


def setback_frame(world: World) -> tuple[np.ndarray, tuple[int, int]]:
    """Comfort setpoints and safety band seen in the setback direction, for masks and behaviour.

    Offsets raise a cooling setpoint and lower a heating one. A cooling setpoint is
    comfort + offset; a heating one is comfort - offset, which lies in the band
    [lo, hi] exactly when -comfort + offset lies in [-hi, -lo]. So the heating season
    passes the negated comfort and band, and one mask serves both seasons.
    """
    h, p = world.homes, world.params
    if p.heating_season:
        return -h.comfort_heat_c, (-p.heat_band_c[1], -p.heat_band_c[0])
    return h.comfort_cool_c, p.cool_band_c


def comfort_setpoint(world: World) -> np.ndarray:
    """Each home's comfort setpoint of the season (cooling in summer, heating in winter), °C."""
    h = world.homes
    return h.comfort_heat_c if world.params.heating_season else h.comfort_cool_c


def setpoint_of(world: World, comfort_c: np.ndarray, offset_c: np.ndarray) -> np.ndarray:
    """The season's setpoint for a setback offset: comfort + offset cooling, comfort - offset heating."""
    return comfort_c - offset_c if world.params.heating_season else comfort_c + offset_c


def behavior_chooser(world: World) -> Chooser:
    """Chooser drawing from the residents' true model, hidden 'feeling hot' state included."""
    h, p = world.homes, world.params
    comfort, band = setback_frame(world)

    def choose(keys: np.ndarray, home: np.ndarray, day: np.ndarray) -> np.ndarray:
        return behavior_probs(
            p.state,
            keys,
            h.depth_pref[home],
            h.keenness[home],
            h.restore_lead[home],
            comfort[home],
            band,
            world.days.feeling_hot[home, day],
        )

    return choose


@dataclass(frozen=True)
class Rollout:
    """Choices of one policy on one world: arrays (n_episodes, MAX_STEPS) by decision j, valid where
    j < n_decisions."""

    state_key: np.ndarray
    """State key at each decision."""
    action: np.ndarray
    """Action taken, °C."""
    prob: np.ndarray
    """Probability the acting policy gave the action taken."""
    offset: np.ndarray
    """Setback offset in force during the step, sp_j - comfort, °C."""

    def final_offset(self, episodes: Episodes) -> np.ndarray:
        """Offset in force at the return, °C, one per episode."""
        m = len(episodes.n)
        return self.offset[np.arange(m), episodes.n_decisions - 1] if m else np.zeros(0, dtype=np.int64)

    def hour_offset(self, episodes: Episodes) -> np.ndarray:
        """Offset in force during each away hour t, (n_episodes, MAX_STEPS), 0 where t >= n."""
        step = np.clip(episodes.step_of_hour, 0, MAX_STEPS - 1)
        inside = np.arange(MAX_STEPS)[None, :] < episodes.n[:, None]
        return np.where(inside, np.take_along_axis(self.offset, step, axis=1), 0)


def roll(world: World, episodes: Episodes, chooser: Chooser, choice_stream: int = 0) -> Rollout:
    """Draw every episode's actions decision by decision; uniforms come from each premise's choice stream."""
    p, h, c = world.params, world.homes, world.clock
    n_days = p.days
    uniforms = np.zeros((len(h.tz), n_days, MAX_STEPS))
    for row, i in enumerate(h.index):
        uniforms[row] = stream(p.seed, STREAM_CHOICE, int(i), choice_stream).random((n_days, MAX_STEPS))
    m = len(episodes.n)
    keys = np.zeros((m, MAX_STEPS), dtype=np.int64)
    acts = np.zeros((m, MAX_STEPS), dtype=np.int64)
    prob = np.ones((m, MAX_STEPS))
    offs = np.zeros((m, MAX_STEPS), dtype=np.int64)
    offset = np.zeros(m, dtype=np.int64)
    home, tz = episodes.home, h.tz[episodes.home]
    frame_comfort, band = setback_frame(world)
    comfort = frame_comfort[home]
    station, plan = h.station[home], h.plan[home]
    n_dec, dec_hour = episodes.n_decisions, episodes.decision_hour
    for j in range(int(n_dec.max(initial=0))):
        act = j < n_dec
        hour = np.where(act, episodes.h0 + dec_hour[:, j], 0)
        k = p.state.encode(
            c.local_hour[tz, hour],
            p.state.degrees(world.weather.temp_c[station, hour], heating=p.heating_season),
            world.tariffs.tier[plan, tz, hour],
            offset,
            n_dec - j,
        )
        ok = allowed(offset, comfort, band, p.state)
        probs = mask_and_normalise(chooser(k, home, episodes.day), ok)
        u = uniforms[home, episodes.day, j]
        idx = np.minimum((u[:, None] >= np.cumsum(probs, axis=1)).sum(axis=1), len(ACTIONS) - 1)
        a = np.where(act, ACTIONS[idx], 0)
        offset = offset + a
        keys[:, j] = np.where(act, k, 0)
        acts[:, j] = a
        prob[:, j] = np.where(act, probs[np.arange(m), idx], 1.0)
        offs[:, j] = offset
    return Rollout(keys, acts, prob, offs)


def away_setpoints(world: World, episodes: Episodes, rollout: Rollout) -> np.ndarray:
    """Setpoint in force while nobody is home, per grid hour and premise (comfort elsewhere)."""
    h = world.homes
    offset = np.zeros((world.clock.n_hours, len(h.tz)))
    t = np.arange(MAX_STEPS)[None, :]
    valid = t < episodes.n[:, None]
    rows = (episodes.h0[:, None] + t)[valid]
    cols = np.broadcast_to(episodes.home[:, None], valid.shape)[valid]
    offset[rows, cols] += rollout.hour_offset(episodes)[valid]
    offset[episodes.h0 + episodes.n, episodes.home] += rollout.final_offset(episodes)
    return setpoint_of(world, comfort_setpoint(world).astype(float)[None, :], offset)


@dataclass(frozen=True)
class Run:
    """Result of the thermal run over the whole grid."""

    meter_kwh: np.ndarray
    """Whole-house kWh per 15-minute interval as the meter reports it (1 Wh resolution), (4 * n_hours, n)."""
    hvac_kwh: np.ndarray
    """Air-conditioner kWh per 15-minute interval, unrounded, (4 * n_hours, n)."""
    t_in_c: np.ndarray | None
    """Indoor temperature at each sub-step start, (n_substeps, n), when recorded."""
    fuel_kwh: np.ndarray | None = None
    """Gas a furnace burnt per 15-minute interval, kWh of fuel energy, (4 * n_hours, n); winter only."""


def thermal_homes(world: World) -> physics.ThermalHomes:
    """The physics view of the world's homes."""
    h = world.homes
    return physics.ThermalHomes(h.r_k_per_kw, h.c_kwh_per_k, h.capacity_kw, h.cop_nominal, h.fan_kw)


def run_grid(world: World, sp_away: np.ndarray, record: bool = False) -> Run:
    """Integrate every home over the grid with residents home at comfort and away at ``sp_away``."""
    p, h, c = world.params, world.homes, world.clock
    per_hour = 60 // p.substep_minutes
    per_quarter = 15 // p.substep_minutes
    dt_h = p.substep_minutes / 60.0
    homes = thermal_homes(world)
    advance = _heating_step(world, dt_h) if p.heating_season else None
    n = len(h.tz)
    t_out = world.weather.temp_c[h.station].T
    irr = world.weather.irradiance_kw_m2[h.station].T
    lo, hi = away_window(c, h, world.days)
    comfort = comfort_setpoint(world).astype(float)
    internal = 0.8 * world.base_kwh / 0.25
    hot_gain = _hot_gain_per_hour(world)
    t_in = comfort.copy()
    running = np.zeros(n, dtype=bool)
    hvac = np.zeros((4 * c.n_hours, n))
    fuel = np.zeros((4 * c.n_hours, n)) if advance is not None else None
    trace = np.empty((c.n_hours * per_hour, n), dtype=np.float32) if record else None
    for hr in range(c.n_hours):
        for s in range(per_hour):
            frac = (s + 0.5) / per_hour
            minute = s * p.substep_minutes
            occupied = ~((minute >= lo[hr]) & (minute < hi[hr]))
            sp = np.where(occupied, comfort, sp_away[hr])
            q = 4 * hr + s // per_quarter
            to = t_out[hr] + (t_out[hr + 1] - t_out[hr]) * frac
            gains = (
                internal[q]
                + 0.25 * occupied
                + hot_gain[hr]
                + h.solar_aperture_m2 * (irr[hr] + (irr[hr + 1] - irr[hr]) * frac)
            )
            if trace is not None:
                trace[hr * per_hour + s] = t_in
            if advance is None:
                t_in, running, _, electric = physics.substep(
                    homes, t_in, running, to, gains, sp, dt_h, p.deadband_c
                )
            else:
                t_in, running, _, electric, burnt = advance(t_in, running, to, gains, sp)
                fuel[q] += burnt * dt_h
            hvac[q] += electric * dt_h
    meter = np.round(hvac + world.base_kwh, 3)
    return Run(meter, hvac, trace, fuel)


def _heating_step(world: World, dt_h: float) -> Callable:
    """One heating sub-step of the world's homes: (t_in, running, t_out, gains, setpoint) -> results."""
    from pipeline.simulate import heating

    h, p = world.homes, world.params

    def advance(t_in, running, t_out, gains, setpoint):
        return heating.substep(
            h.r_k_per_kw,
            h.c_kwh_per_k,
            world.heating,
            p.heating,
            t_in,
            running,
            t_out,
            gains,
            setpoint,
            dt_h,
            p.deadband_c,
        )

    return advance


def _hot_gain_per_hour(world: World) -> np.ndarray:
    """Extra indoor heat on hidden 'feeling hot' days (stuffy house, dehumidifier), kW, (n_hours, n)."""
    c, h = world.clock, world.homes
    day = c.local_day[:, : c.n_hours][h.tz].T
    valid = (day >= 0) & (day < world.params.days)
    d = np.clip(day, 0, world.params.days - 1)
    return 0.3 * (valid & world.days.feeling_hot[np.arange(len(h.tz))[None, :], d])


def hourly(meter_kwh: np.ndarray) -> np.ndarray:
    """Sum 15-minute reads to grid hours, (n_hours, n)."""
    return meter_kwh.reshape(-1, 4, meter_kwh.shape[1]).sum(axis=1)


def _hour_costs(world: World, episodes: Episodes, run: Run) -> tuple[np.ndarray, np.ndarray]:
    """kWh and cost, USD, of each episode hour from h_0 through the recovery window, (n_episodes, k)."""
    h = world.homes
    price = world.tariffs.price[h.plan, h.tz][:, : world.clock.n_hours].T
    e, hours, cols = _window(world, episodes, hourly(run.meter_kwh))
    return e, e * price[hours, cols]


def _window(
    world: World, episodes: Episodes, per_hour: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Hourly values of each episode from h_0 through the recovery window (0 beyond), with their indices."""
    t = np.arange(MAX_STEPS + world.params.recovery_hours + 1)[None, :]
    in_window = t <= (episodes.n + world.params.recovery_hours)[:, None]
    hours = np.where(in_window, episodes.h0[:, None] + t, 0)
    cols = np.broadcast_to(episodes.home[:, None], hours.shape)
    return np.where(in_window, per_hour[hours, cols], 0.0), hours, cols


def _utc_start(world: World, hours: np.ndarray) -> np.ndarray:
    return np.datetime64(world.clock.t0.replace(tzinfo=None), "us") + hours.astype("timedelta64[h]")


def episode_frame(world: World, episodes: Episodes, rollout: Rollout, run: Run) -> pl.DataFrame:
    """One row per episode: premise, start (UTC), steps, away hours, return, kWh and penalty."""
    p, h = world.params, world.homes
    e, cost = _hour_costs(world, episodes, run)
    in_steps = np.arange(cost.shape[1])[None, :] < episodes.n[:, None]
    step_cost = np.where(in_steps, cost, 0.0).sum(axis=1)
    rec_cost = np.where(in_steps, 0.0, cost).sum(axis=1)
    final = rollout.final_offset(episodes)
    pen = comfort_penalty(final, p.recovery_hours, p.penalty_usd_per_degree_hour)
    ret = episode_return(step_cost, rec_cost, final, p.recovery_hours, p.penalty_usd_per_degree_hour)
    # A furnace's gas never reaches the meter; the truth keeps it beside the electric kWh.
    gas = {}
    if run.fuel_kwh is not None:
        gas["gas_kwh"] = _window(world, episodes, hourly(run.fuel_kwh))[0].sum(axis=1)
    return pl.DataFrame(
        {
            "premise_id": h.premise_id[episodes.home],
            "episode_start": _utc_start(world, episodes.h0),
            "n_steps": episodes.n_decisions,
            "away_hours": episodes.n,
            "return_usd": ret,
            "kwh": e.sum(axis=1),
            "comfort_penalty_usd": pen,
            "final_offset_c": final,
            "presence_sensing": h.presence[episodes.home],
            **gas,
        }
    ).with_columns(pl.col("episode_start").dt.replace_time_zone("UTC"))


def step_frame(world: World, episodes: Episodes, rollout: Rollout, run: Run) -> pl.DataFrame:
    """One row per decision step with its state, action, probability, length and reward."""
    h = world.homes
    m = len(episodes.n)
    _, cost = _hour_costs(world, episodes, run)
    t = np.arange(MAX_STEPS)[None, :]
    inside = t < episodes.n[:, None]
    flat = (np.arange(m)[:, None] * MAX_STEPS + np.clip(episodes.step_of_hour, 0, None))[inside]
    step_cost = np.bincount(flat, weights=cost[:, :MAX_STEPS][inside], minlength=m * MAX_STEPS)
    step_hours = np.bincount(flat, minlength=m * MAX_STEPS).reshape(m, MAX_STEPS)
    reward = -step_cost.reshape(m, MAX_STEPS)
    valid = t < episodes.n_decisions[:, None]
    last = t == (episodes.n_decisions - 1)[:, None]
    ret = episode_frame(world, episodes, rollout, run)["return_usd"].to_numpy()
    reward = np.where(last, reward + (ret - np.where(valid, reward, 0.0).sum(axis=1))[:, None], reward)
    ep_idx = np.broadcast_to(np.arange(m)[:, None], valid.shape)[valid]
    hours = episodes.h0[:, None] + episodes.decision_hour
    return pl.DataFrame(
        {
            "premise_id": h.premise_id[episodes.home][ep_idx],
            "episode_start": _utc_start(world, episodes.h0)[ep_idx],
            "t": np.broadcast_to(t, valid.shape)[valid],
            "hour_start": _utc_start(world, hours[valid]),
            "step_hours": step_hours[valid],
            "state_key": rollout.state_key[valid],
            "action": rollout.action[valid],
            "probability": rollout.prob[valid],
            "reward_usd": reward[valid],
        }
    ).with_columns(
        pl.col("episode_start").dt.replace_time_zone("UTC"), pl.col("hour_start").dt.replace_time_zone("UTC")
    )
