"""Write a simulated lake: landing files as a utility receives them, and the truth beside them.

``<out>/landing/`` holds what the pipeline reads; ``<out>/truth/`` holds what
only the simulator knows (true behaviour probabilities, home parameters,
logged episodes and steps with their exact returns). The pipeline never reads
``truth/``.
"""

from __future__ import annotations

import argparse
import hashlib
import time
from collections.abc import Sequence
from dataclasses import replace
from datetime import date
from pathlib import Path

import numpy as np
import polars as pl

from pipeline.simulate.behavior import ACTIONS, behavior_tables
from pipeline.simulate.engine import (
    MAX_STEPS,
    Episodes,
    Rollout,
    Run,
    away_setpoints,
    behavior_chooser,
    episode_frame,
    find_episodes,
    roll,
    run_grid,
    step_frame,
)
from pipeline.simulate.params import SimParams, SimulationError
from pipeline.simulate.rollout import CANDIDATES, true_values
from pipeline.simulate.world import World, build_world


def generate_lake(
    out_dir: str | Path,
    n_premises: int = 60,
    seed: int = 20260601,
    start: date = date(2026, 6, 1),
    days: int = 92,
    params: SimParams | None = None,
    policy_values: bool = False,
) -> dict:
    """Simulate homes and write ``landing/`` and ``truth/`` under ``out_dir``; return a summary.

    ``params``, when given, overrides the defaults; ``n_premises``, ``seed``,
    ``start`` and ``days`` are then applied on top of it. With
    ``policy_values``, ``truth/policy_values.parquet`` also records the true
    value of the default candidate rules (see ``true_values``).
    """
    began = time.perf_counter()
    params = replace(params or SimParams(), n_premises=n_premises, seed=seed, start=start, days=days)
    out = Path(out_dir)
    world = build_world(params)
    episodes = find_episodes(world)
    rollout = roll(world, episodes, behavior_chooser(world), choice_stream=0)
    run = run_grid(world, away_setpoints(world, episodes, rollout), record=True)
    landing, truth = out / "landing", out / "truth"
    for sub in ("premises", "meter", "weather", "thermostat", "tariffs"):
        (landing / sub).mkdir(parents=True, exist_ok=True)
    truth.mkdir(parents=True, exist_ok=True)
    _write_premises(world, landing / "premises" / "premises.csv")
    meter_rows = _write_meter(world, run, landing / "meter")
    _write_weather(world, landing / "weather")
    _write_tariffs(world, landing / "tariffs" / "tariffs.csv")
    thermostat_rows = _write_thermostat(world, episodes, rollout, run, landing / "thermostat")
    ep = episode_frame(world, episodes, rollout, run)
    steps = step_frame(world, episodes, rollout, run)
    _write_truth(world, ep, steps, truth)
    shares = followed_shares(world, episodes, rollout)
    seen = followed_shares(world, episodes, rollout, observable_only=True)
    if policy_values:
        true_values(params, world=world).write_parquet(truth / "policy_values.parquet", compression="zstd")
    files = {str(f.relative_to(out)): f.stat().st_size for f in sorted(out.rglob("*")) if f.is_file()}
    return {
        "n_premises": params.n_premises,
        "seed": params.seed,
        "start": params.start.isoformat(),
        "days": params.days,
        "n_episodes": ep.height,
        "n_steps": steps.height,
        "meter_rows": meter_rows,
        "thermostat_rows": thermostat_rows,
        "mean_return_usd": float(ep["return_usd"].mean()) if ep.height else float("nan"),
        "followed_share": shares,
        "followed_share_observable": seen,
        "files": files,
        "bytes": sum(files.values()),
        "seconds": time.perf_counter() - began,
    }


def followed_shares(
    world: World, episodes: Episodes, rollout: Rollout, observable_only: bool = False
) -> dict[str, float]:
    """Share of episodes in which every logged action equals what each candidate rule would do.

    With ``observable_only``, only episodes of homes with presence sensing count.
    """
    valid = np.arange(MAX_STEPS)[None, :] < episodes.n_decisions[:, None]
    keep = world.homes.presence[episodes.home] if observable_only else np.ones(len(episodes.n), dtype=bool)
    out = {}
    for rule in CANDIDATES:
        wanted = rule.actions(world.params.state, rollout.state_key)
        same = ((wanted == rollout.action) | ~valid).all(axis=1)[keep]
        out[rule.name] = float(same.mean()) if len(same) else 0.0
    return out


def _utc_strings(t0, hours: np.ndarray, minutes: np.ndarray | int = 0, suffix: str = "+00:00") -> pl.Series:
    stamps = (
        np.datetime64(t0.replace(tzinfo=None), "m")
        + np.asarray(hours).astype("timedelta64[h]")
        + np.asarray(minutes).astype("timedelta64[m]")
    )
    return pl.Series(np.datetime_as_string(stamps, unit="s")) + suffix


def _write_premises(world: World, path: Path) -> None:
    h, p = world.homes, world.params
    station_ids = np.array([s.station_id for s in p.stations])
    plan_ids = np.array(world.tariffs.plan_ids)
    towns = np.array([s.town.split()[0].lower() for s in p.stations])
    kind = np.array(["tou" if "TOU" in pid else "flat" for pid in plan_ids])
    pl.DataFrame(
        {
            "premise_id": h.premise_id,
            "timezone": np.array(world.clock.timezones)[h.tz],
            "weather_station_id": station_ids[h.station],
            "rate_plan_id": plan_ids[h.plan],
            "comfort_cool_c": h.comfort_cool_c,
            "comfort_heat_c": h.comfort_heat_c,
            "cohort": np.char.add(np.char.add(towns[h.station], "-"), kind[h.plan]),
            "floor_area_m2": h.floor_area_m2.astype(np.int64),
        }
    ).write_csv(path)


def _local_quarters(world: World) -> tuple[np.ndarray, np.ndarray]:
    """Per premise and 15-minute interval: inside the local window, and the local month key."""
    c, h = world.clock, world.homes
    hour_q = np.repeat(np.arange(c.n_hours), 4)
    day = c.local_day[:, hour_q][h.tz].T
    month = c.month[:, hour_q][h.tz].T
    return (day >= 0) & (day < world.params.days), month


def _write_meter(world: World, run: Run, folder: Path) -> int:
    c, h = world.clock, world.homes
    n_q = run.meter_kwh.shape[0]
    inside, month = _local_quarters(world)
    year = _local_year(world)
    start = np.datetime64(c.t0.replace(tzinfo=None), "us") + (np.arange(n_q) * 15).astype("timedelta64[m]")
    rows = 0
    for key in np.unique((year * 100 + month)[inside]):
        sel = inside & (year * 100 + month == key)
        home, q_idx = np.nonzero(sel.T)
        frame = pl.DataFrame(
            {
                "premise_id": h.premise_id[home],
                "interval_start": start[q_idx],
                "interval_minutes": np.full(len(home), 15, dtype=np.int32),
                "kwh": run.meter_kwh[q_idx, home],
                "quality": np.where(world.estimated[q_idx, home], "estimated", "actual"),
            }
        ).with_columns(pl.col("interval_start").dt.replace_time_zone("UTC"))
        frame.write_parquet(folder / f"meter_{key // 100:04d}-{key % 100:02d}.parquet", compression="zstd")
        rows += frame.height
    return rows


def _local_year(world: World) -> np.ndarray:
    """Local calendar year of each premise-interval."""
    c, h = world.clock, world.homes
    hour_q = np.repeat(np.arange(c.n_hours), 4)
    return _year_of(world, c.local_day[:, hour_q][h.tz].T)


def _year_of(world: World, local_day: np.ndarray) -> np.ndarray:
    """Calendar year of local day indices (counted from the start day)."""
    ordinal = world.params.start.toordinal() + np.asarray(local_day)
    uniq, inverse = np.unique(ordinal, return_inverse=True)
    years = np.array([date.fromordinal(int(o)).year for o in uniq], dtype=np.int64)
    return years[inverse].reshape(ordinal.shape)


def _write_weather(world: World, folder: Path) -> None:
    c = world.clock
    hours = np.arange(c.n_hours + 1)
    for j, st in enumerate(world.params.stations):
        col = "dry_bulb_f" if st.unit == "f" else "dry_bulb_c"
        pl.DataFrame(
            {
                "station_id": np.full(len(hours), st.station_id),
                "observed_at": _utc_strings(c.t0, hours, 0, st.utc_suffix),
                col: world.weather.published[j],
            }
        ).write_csv(folder / f"weather_{st.station_id}.csv", float_precision=1)


def _write_tariffs(world: World, path: Path) -> None:
    rows = [
        (pid, r.months, r.day_type, r.start_hour, r.end_hour, r.price_per_kwh)
        for pid, plan_rows in world.params.plans
        for r in plan_rows
    ]
    pl.DataFrame(
        rows,
        schema=["rate_plan_id", "months", "day_type", "start_hour", "end_hour", "price_per_kwh"],
        orient="row",
    ).write_csv(path)


def _write_thermostat(world: World, episodes: Episodes, rollout: Rollout, run: Run, folder: Path) -> int:
    """Initial rows, departures, setpoint changes at decisions and returns, one CSV per UTC month."""
    c, h, p = world.clock, world.homes, world.params
    per_hour = 60 // p.substep_minutes
    trace = run.t_in_c
    parts: list[dict[str, np.ndarray]] = []

    def add(home, hour, minute, setpoint, occupied):
        home, hour, minute = (np.asarray(x, dtype=np.int64) for x in (home, hour, minute))
        indoor = np.round(trace[hour * per_hour + minute // p.substep_minutes, home].astype(float), 1)
        occ = np.where(h.presence[home], np.asarray(occupied, dtype=float), np.nan)
        month = c.month[h.tz[home], hour] + 100 * _year_of(world, c.local_day[h.tz[home], hour])
        parts.append(
            {
                "home": home,
                "hour": hour,
                "minute": minute,
                "sp": np.asarray(setpoint, float),
                "occ": occ,
                "indoor": indoor,
                "month": month,
            }
        )

    n = len(h.tz)
    first_hour = c.hour_index[h.tz, 1, 0]
    add(np.arange(n), first_hour, np.zeros(n), h.comfort_cool_c, np.ones(n))
    home, day = np.nonzero(world.days.away)
    dep, ret = world.days.depart_min[home, day], world.days.return_min[home, day]
    dep_hour = c.hour_index[h.tz[home], day + 1, dep // 60]
    ret_hour = c.hour_index[h.tz[home], day + 1, ret // 60]
    ok = (dep_hour >= 0) & (ret_hour >= 0)
    sens = ok & h.presence[home]
    add(home[sens], dep_hour[sens], dep[sens] % 60, h.comfort_cool_c[home[sens]], np.zeros(sens.sum()))
    t = np.arange(MAX_STEPS)[None, :]
    changed = (t < episodes.n_decisions[:, None]) & (rollout.action != 0)
    e_idx, t_idx = np.nonzero(changed)
    ehome = episodes.home[e_idx]
    add(
        ehome,
        episodes.h0[e_idx] + episodes.decision_hour[e_idx, t_idx],
        np.zeros(len(e_idx)),
        h.comfort_cool_c[ehome] + rollout.offset[e_idx, t_idx],
        np.zeros(len(e_idx)),
    )
    final = np.zeros(world.days.away.shape, dtype=np.int64)
    if len(episodes.n):
        final[episodes.home, episodes.day] = rollout.final_offset(episodes)
    back = ok & (h.presence[home] | (final[home, day] != 0))
    add(home[back], ret_hour[back], ret[back] % 60, h.comfort_cool_c[home[back]], np.ones(back.sum()))
    cat = {k: np.concatenate([part[k] for part in parts]) for k in parts[0]}
    stamps = (
        np.datetime64(c.t0.replace(tzinfo=None), "m")
        + cat["hour"].astype("timedelta64[h]")
        + cat["minute"].astype("timedelta64[m]")
    )
    frame = (
        pl.DataFrame(
            {
                "premise_id": h.premise_id[cat["home"]],
                "stamp": stamps.astype("datetime64[ms]"),
                "mode": np.full(len(stamps), "cool"),
                "cool_setpoint_c": cat["sp"],
                "heat_setpoint_c": h.comfort_heat_c[cat["home"]].astype(float),
                "occupied": pl.Series(cat["occ"], nan_to_null=True).cast(pl.Int8),
                "indoor_c": cat["indoor"],
                "month_key": cat["month"],
            }
        )
        .sort(["stamp", "premise_id"], maintain_order=True)
        .with_columns(
            changed_at=pl.col("stamp").dt.strftime("%Y-%m-%dT%H:%M:%S+00:00"),
        )
    )
    for key in np.unique(cat["month"]):
        part = frame.filter(pl.col("month_key") == key).select(
            "premise_id", "changed_at", "mode", "cool_setpoint_c", "heat_setpoint_c", "occupied", "indoor_c"
        )
        part.write_csv(folder / f"thermostat_{key // 100:04d}-{key % 100:02d}.csv", float_precision=1)
    return frame.height


def _write_truth(world: World, episodes: pl.DataFrame, steps: pl.DataFrame, folder: Path) -> None:
    p, h = world.params, world.homes
    space = p.state
    states = space.n_states
    hot_levels = (False, True) if p.hidden_confounder else (False,)
    frames = []
    for hot in hot_levels:
        tables = behavior_tables(
            space, h.depth_pref, h.keenness, h.restore_lead, h.comfort_cool_c, p.cool_band_c, hot
        )
        n, k = len(h.tz), len(ACTIONS)
        cols = {
            "premise_id": np.repeat(h.premise_id, states * k),
            "state_key": np.tile(np.repeat(np.arange(states), k), n),
            "action": np.tile(ACTIONS.astype(np.int8), n * states),
            "probability": tables.reshape(-1),
        }
        if p.hidden_confounder:
            cols["feeling_hot"] = np.full(n * states * k, hot)
        frames.append(pl.DataFrame(cols))
    pl.concat(frames).write_parquet(folder / "behavior_probabilities.parquet", compression="zstd")
    pl.DataFrame(
        {
            "premise_id": h.premise_id,
            "r_k_per_kw": h.r_k_per_kw,
            "c_kwh_per_k": h.c_kwh_per_k,
            "time_constant_h": h.r_k_per_kw * h.c_kwh_per_k,
            "capacity_kw": h.capacity_kw,
            "cop_nominal": h.cop_nominal,
            "fan_kw": h.fan_kw,
            "solar_aperture_m2": h.solar_aperture_m2,
            "base_kw": h.base_kw,
            "depth_pref_c": h.depth_pref,
            "keenness": h.keenness,
            "restore_lead": h.restore_lead,
            "presence_sensing": h.presence,
        }
    ).write_parquet(folder / "premise_parameters.parquet", compression="zstd")
    episodes.write_parquet(folder / "episodes.parquet", compression="zstd")
    steps.write_parquet(folder / "steps.parquet", compression="zstd")


def true_step_probabilities(root: str | Path, steps: pl.DataFrame) -> np.ndarray:
    """The residents' true probability of each logged action, from ``truth/steps.parquet``.

    ``steps`` are the pipeline's decision steps (premise_id, step_start_utc), in any
    order; the result follows that order, shape (n_steps,). Raises SimulationError
    when a step has no simulated counterpart (e.g. episodes the simulator never made).
    """
    truth = pl.read_parquet(Path(root) / "truth" / "steps.parquet").select(
        "premise_id",
        pl.col("hour_start").dt.convert_time_zone("UTC").alias("step_start_utc"),
        pl.col("probability"),
    )
    joined = steps.select("premise_id", pl.col("step_start_utc").dt.convert_time_zone("UTC")).join(
        truth, on=["premise_id", "step_start_utc"], how="left", maintain_order="left"
    )
    if joined["probability"].null_count():
        raise SimulationError(f"{joined['probability'].null_count()} steps have no simulated counterpart")
    return joined["probability"].to_numpy()


def manifest(root: str | Path) -> dict[str, str]:
    """SHA-256 of every file under ``landing/`` and ``truth/`` of a lake, keyed by relative path."""
    root = Path(root)
    out = {}
    for f in sorted(root.rglob("*")):
        rel = f.relative_to(root).as_posix()
        if f.is_file() and rel.split("/")[0] in ("landing", "truth"):
            out[rel] = hashlib.sha256(f.read_bytes()).hexdigest()
    return out


def write_manifest(root: str | Path, name: str = "MANIFEST.sha256") -> Path:
    """Write ``<sha256>  <path>`` lines for the lake's files (the format ``sha256sum -c`` reads)."""
    path = Path(root) / name
    path.write_text("".join(f"{sha}  {rel}\n" for rel, sha in manifest(root).items()))
    return path


def read_manifest(path: str | Path) -> dict[str, str]:
    """Parse a manifest written by ``write_manifest``."""
    out = {}
    for line in Path(path).read_text().splitlines():
        sha, rel = line.split("  ", 1)
        out[rel] = sha
    return out


def main_simulate(args: argparse.Namespace | Sequence[str] | None = None) -> dict:
    """Entry for ``thermal-ledger simulate --premises N --seed S --out DIR [--start D --days K]``."""
    if not isinstance(args, argparse.Namespace):
        parser = argparse.ArgumentParser(prog="thermal-ledger simulate")
        parser.add_argument("--premises", type=int, default=60)
        parser.add_argument("--seed", type=int, default=SimParams().seed)
        parser.add_argument("--out", required=True)
        parser.add_argument("--start", type=date.fromisoformat, default=SimParams().start)
        parser.add_argument("--days", type=int, default=SimParams().days)
        parser.add_argument("--hidden-confounder", action="store_true")
        parser.add_argument("--manifest", action="store_true")
        parser.add_argument("--policy-values", action="store_true")
        args = parser.parse_args(args)
    params = SimParams(hidden_confounder=bool(getattr(args, "hidden_confounder", False)))
    summary = generate_lake(
        args.out,
        n_premises=args.premises,
        seed=args.seed,
        start=getattr(args, "start", params.start),
        days=getattr(args, "days", params.days),
        params=params,
        policy_values=bool(getattr(args, "policy_values", False)),
    )
    if getattr(args, "manifest", False):
        write_manifest(args.out)
    return summary
