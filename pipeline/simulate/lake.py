"""Write a simulated lake: landing files as a utility receives them, and the truth beside them.

``<out>/landing/`` holds what the pipeline reads; ``<out>/truth/`` holds what
only the simulator knows (true behaviour probabilities, home parameters,
logged episodes and steps with their exact returns). The pipeline never reads
``truth/``.
"""

from __future__ import annotations

import argparse
import hashlib
import tempfile
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
    comfort_setpoint,
    episode_frame,
    find_episodes,
    roll,
    run_grid,
    setback_frame,
    setpoint_of,
    step_frame,
)
from pipeline.simulate.params import SEASONS, SimParams, SimulationError, winter_params
from pipeline.simulate.rollout import CANDIDATES, policy_runs, summarise_runs
from pipeline.simulate.world import Shared, World, build_shared, build_world

CHUNK_PREMISES = 500
"""Premises simulated at a time by ``generate_lake``; peak memory grows with it, not with the lake."""

_ROW_GROUP_ROWS = 100_000
"""Most rows in one Parquet row group; a file's row groups are equal in size, whatever the chunk size."""


def generate_lake(
    out_dir: str | Path,
    n_premises: int | None = None,
    seed: int | None = None,
    start: date | None = None,
    days: int | None = None,
    params: SimParams | None = None,
    policy_values: bool = False,
    chunk_premises: int = CHUNK_PREMISES,
) -> dict:
    """Simulate homes and write ``landing/`` and ``truth/`` under ``out_dir``; return a summary.

    ``params`` (default ``SimParams()``: the summer sample lake's) sets everything;
    ``n_premises``, ``seed``, ``start`` and ``days``, when given, are applied on top of it. With
    ``policy_values``, ``truth/policy_values.parquet`` also records the true
    value of the default candidate rules (see ``true_values``). Homes are
    simulated ``chunk_premises`` at a time on the lake's one weather and price
    draw, each from its own streams, and written as they are done, so the files
    do not depend on the chunk size and memory is bounded by the chunk.
    """
    began = time.perf_counter()
    given = {"n_premises": n_premises, "seed": seed, "start": start, "days": days}
    params = replace(params or SimParams(), **{k: v for k, v in given.items() if v is not None})
    counts = (("n_premises", params.n_premises), ("days", params.days), ("chunk_premises", chunk_premises))
    for name, value in counts:
        if value < 1:
            raise SimulationError(f"{name} must be at least 1, got {value}")
    out = Path(out_dir)
    shared = build_shared(params)
    landing, truth = out / "landing", out / "truth"
    for sub in ("premises", "meter", "weather", "thermostat", "tariffs"):
        (landing / sub).mkdir(parents=True, exist_ok=True)
    truth.mkdir(parents=True, exist_ok=True)
    _write_weather(params, shared, landing / "weather")
    _write_tariffs(params, landing / "tariffs" / "tariffs.csv")
    thermostat, episodes_parts, steps_parts, parameters = [], [], [], []
    followed: list[tuple[dict[str, np.ndarray], np.ndarray]] = []
    runs: list[list[tuple[str, float, pl.DataFrame]]] = []
    meter_rows = 0
    with tempfile.TemporaryDirectory(dir=out, prefix=".chunks-") as scratch:
        parts = _Parts(Path(scratch))
        with (landing / "premises" / "premises.csv").open("wb") as premises_csv:
            for first in range(0, params.n_premises, chunk_premises):
                chunk = range(first, min(params.n_premises, first + chunk_premises))
                world = build_world(params, chunk, shared)
                episodes = find_episodes(world)
                rollout = roll(world, episodes, behavior_chooser(world), choice_stream=0)
                run = run_grid(world, away_setpoints(world, episodes, rollout), record=True)
                _premise_rows(world).write_csv(premises_csv, include_header=first == 0)
                meter_rows += _meter_parts(world, run, parts)
                thermostat.append(_thermostat_rows(world, episodes, rollout, run))
                episodes_parts.append(episode_frame(world, episodes, rollout, run))
                steps_parts.append(step_frame(world, episodes, rollout, run))
                _behavior_parts(world, parts)
                parameters.append(_parameter_rows(world))
                followed.append((_followed(world, episodes, rollout), world.homes.presence[episodes.home]))
                if policy_values:
                    runs.append(policy_runs(world))
                del world, episodes, rollout, run
        for name in parts.names("meter_"):
            parts.write([name], landing / "meter" / f"{name}.parquet")
        parts.write(parts.names("behavior_"), truth / "behavior_probabilities.parquet")
    thermostat_rows = _write_thermostat(_concat(thermostat), landing / "thermostat")
    ep, steps = _concat(episodes_parts), _concat(steps_parts)
    _concat(parameters).write_parquet(truth / "premise_parameters.parquet", compression="zstd")
    ep.write_parquet(truth / "episodes.parquet", compression="zstd")
    steps.write_parquet(truth / "steps.parquet", compression="zstd")
    if policy_values:
        whole = [(name, eps, _concat([r[k][2] for r in runs])) for k, (name, eps, _) in enumerate(runs[0])]
        summarise_runs(whole).write_parquet(truth / "policy_values.parquet", compression="zstd")
    files = {str(f.relative_to(out)): f.stat().st_size for f in sorted(out.rglob("*")) if f.is_file()}
    return {
        "season": params.season,
        "n_premises": params.n_premises,
        "seed": params.seed,
        "start": params.start.isoformat(),
        "days": params.days,
        "n_episodes": ep.height,
        "n_steps": steps.height,
        "meter_rows": meter_rows,
        "thermostat_rows": thermostat_rows,
        "mean_return_usd": float(ep["return_usd"].mean()) if ep.height else float("nan"),
        "followed_share": _shares(followed, observable_only=False),
        "followed_share_observable": _shares(followed, observable_only=True),
        "files": files,
        "bytes": sum(files.values()),
        "seconds": time.perf_counter() - began,
    }


def _concat(frames: list[pl.DataFrame]) -> pl.DataFrame:
    """One contiguous frame, so Parquet row groups and float sums do not follow the chunks."""
    return pl.concat(frames).rechunk()


class _Parts:
    """Frames of one output file written chunk by chunk to scratch, then streamed into the file in order."""

    def __init__(self, folder: Path) -> None:
        self._folder = folder
        self._files: dict[str, list[Path]] = {}
        self._rows: dict[str, int] = {}

    def add(self, name: str, frame: pl.DataFrame) -> None:
        """Keep ``frame`` as the next part of output ``name``."""
        files = self._files.setdefault(name, [])
        path = self._folder / f"{name}-{len(files):06d}.arrow"
        frame.write_ipc(path, compression="zstd")
        files.append(path)
        self._rows[name] = self._rows.get(name, 0) + frame.height

    def names(self, prefix: str) -> list[str]:
        """Outputs whose name starts with ``prefix``, sorted."""
        return sorted(n for n in self._files if n.startswith(prefix))

    def write(self, names: list[str], path: Path) -> None:
        """Stream the parts of ``names``, in order, into one Parquet file with equal row groups of at most
        _ROW_GROUP_ROWS rows."""
        rows = sum(self._rows[name] for name in names)
        groups = max(1, -(-rows // _ROW_GROUP_ROWS))
        pl.scan_ipc([f for name in names for f in self._files[name]]).sink_parquet(
            path, compression="zstd", row_group_size=max(1, -(-rows // groups))
        )


def followed_shares(
    world: World, episodes: Episodes, rollout: Rollout, observable_only: bool = False
) -> dict[str, float]:
    """Share of episodes in which every logged action equals what each candidate rule would do.

    With ``observable_only``, only episodes of homes with presence sensing count.
    """
    seen = world.homes.presence[episodes.home]
    return _shares([(_followed(world, episodes, rollout), seen)], observable_only)


def _followed(world: World, episodes: Episodes, rollout: Rollout) -> dict[str, np.ndarray]:
    """Per candidate rule, whether every logged action of each episode equals what the rule would do."""
    valid = np.arange(MAX_STEPS)[None, :] < episodes.n_decisions[:, None]
    return {
        rule.name: ((rule.actions(world.params.state, rollout.state_key) == rollout.action) | ~valid).all(1)
        for rule in CANDIDATES
    }


def _shares(chunks: list[tuple[dict[str, np.ndarray], np.ndarray]], observable_only: bool) -> dict:
    """Share of followed episodes per rule over the chunks' (followed, presence sensing) arrays."""
    out = {}
    for rule in CANDIDATES:
        same = np.concatenate([f[rule.name][seen | (not observable_only)] for f, seen in chunks])
        out[rule.name] = float(same.mean()) if len(same) else 0.0
    return out


def _utc_strings(t0, hours: np.ndarray, minutes: np.ndarray | int = 0, suffix: str = "+00:00") -> pl.Series:
    stamps = (
        np.datetime64(t0.replace(tzinfo=None), "m")
        + np.asarray(hours).astype("timedelta64[h]")
        + np.asarray(minutes).astype("timedelta64[m]")
    )
    return pl.Series(np.datetime_as_string(stamps, unit="s")) + suffix


def _premise_rows(world: World) -> pl.DataFrame:
    h, p = world.homes, world.params
    station_ids = np.array([s.station_id for s in p.stations])
    plan_ids = np.array(world.tariffs.plan_ids)
    towns = np.array([s.town.split()[0].lower() for s in p.stations])
    kind = np.array(["tou" if "TOU" in pid else "flat" for pid in plan_ids])
    return pl.DataFrame(
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
    )


def _local_quarters(world: World) -> tuple[np.ndarray, np.ndarray]:
    """Per premise and 15-minute interval: inside the local window, and the local month key."""
    c, h = world.clock, world.homes
    hour_q = np.repeat(np.arange(c.n_hours), 4)
    day = c.local_day[:, hour_q][h.tz].T
    month = c.month[:, hour_q][h.tz].T
    return (day >= 0) & (day < world.params.days), month


def _meter_parts(world: World, run: Run, parts: _Parts) -> int:
    """Add the chunk's reads to each local month's meter file; return the rows added."""
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
        parts.add(f"meter_{key // 100:04d}-{key % 100:02d}", frame)
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


def _write_weather(params: SimParams, shared: Shared, folder: Path) -> None:
    c = shared.clock
    hours = np.arange(c.n_hours + 1)
    for j, st in enumerate(params.stations):
        col = "dry_bulb_f" if st.unit == "f" else "dry_bulb_c"
        pl.DataFrame(
            {
                "station_id": np.full(len(hours), st.station_id),
                "observed_at": _utc_strings(c.t0, hours, 0, st.utc_suffix),
                col: shared.weather.published[j],
            }
        ).write_csv(folder / f"weather_{st.station_id}.csv", float_precision=1)


def _write_tariffs(params: SimParams, path: Path) -> None:
    rows = [
        (pid, r.months, r.day_type, r.start_hour, r.end_hour, r.price_per_kwh)
        for pid, plan_rows in params.plans
        for r in plan_rows
    ]
    pl.DataFrame(
        rows,
        schema=["rate_plan_id", "months", "day_type", "start_hour", "end_hour", "price_per_kwh"],
        orient="row",
    ).write_csv(path)


def _thermostat_rows(world: World, episodes: Episodes, rollout: Rollout, run: Run) -> pl.DataFrame:
    """Initial rows, departures, setpoint changes at decisions and returns, with their local month key."""
    c, h, p = world.clock, world.homes, world.params
    per_hour = 60 // p.substep_minutes
    trace = run.t_in_c
    parts: list[dict[str, np.ndarray]] = []

    comfort = comfort_setpoint(world)

    def add(home, hour, minute, offset, occupied):
        home, hour, minute = (np.asarray(x, dtype=np.int64) for x in (home, hour, minute))
        setpoint = setpoint_of(world, comfort[home], np.asarray(offset, dtype=np.int64))
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
    add(np.arange(n), first_hour, np.zeros(n), np.zeros(n), np.ones(n))
    home, day = np.nonzero(world.days.away)
    dep, ret = world.days.depart_min[home, day], world.days.return_min[home, day]
    dep_hour = c.hour_index[h.tz[home], day + 1, dep // 60]
    ret_hour = c.hour_index[h.tz[home], day + 1, ret // 60]
    ok = (dep_hour >= 0) & (ret_hour >= 0)
    sens = ok & h.presence[home]
    add(home[sens], dep_hour[sens], dep[sens] % 60, np.zeros(sens.sum()), np.zeros(sens.sum()))
    t = np.arange(MAX_STEPS)[None, :]
    changed = (t < episodes.n_decisions[:, None]) & (rollout.action != 0)
    e_idx, t_idx = np.nonzero(changed)
    ehome = episodes.home[e_idx]
    add(
        ehome,
        episodes.h0[e_idx] + episodes.decision_hour[e_idx, t_idx],
        np.zeros(len(e_idx)),
        rollout.offset[e_idx, t_idx],
        np.zeros(len(e_idx)),
    )
    final = np.zeros(world.days.away.shape, dtype=np.int64)
    if len(episodes.n):
        final[episodes.home, episodes.day] = rollout.final_offset(episodes)
    back = ok & (h.presence[home] | (final[home, day] != 0))
    add(home[back], ret_hour[back], ret[back] % 60, np.zeros(back.sum()), np.ones(back.sum()))
    cat = {k: np.concatenate([part[k] for part in parts]) for k in parts[0]}
    stamps = (
        np.datetime64(c.t0.replace(tzinfo=None), "m")
        + cat["hour"].astype("timedelta64[h]")
        + cat["minute"].astype("timedelta64[m]")
    )
    # The setpoint of the other season's system stays at its comfort value.
    heating = p.heating_season
    other = (h.comfort_cool_c if heating else h.comfort_heat_c)[cat["home"]].astype(float)
    return pl.DataFrame(
        {
            "premise_id": h.premise_id[cat["home"]],
            "stamp": stamps.astype("datetime64[ms]"),
            "mode": np.full(len(stamps), "heat" if heating else "cool"),
            "cool_setpoint_c": other if heating else cat["sp"],
            "heat_setpoint_c": cat["sp"] if heating else other,
            "occupied": pl.Series(cat["occ"], nan_to_null=True).cast(pl.Int8),
            "indoor_c": cat["indoor"],
            "month_key": cat["month"],
        }
    )


def _write_thermostat(rows: pl.DataFrame, folder: Path) -> int:
    """One CSV per month in time order; a premise's rows are all in one chunk, so ties keep their order."""
    frame = rows.sort(["stamp", "premise_id"], maintain_order=True).with_columns(
        changed_at=pl.col("stamp").dt.strftime("%Y-%m-%dT%H:%M:%S+00:00"),
    )
    for key in frame["month_key"].unique().sort().to_list():
        part = frame.filter(pl.col("month_key") == key).select(
            "premise_id", "changed_at", "mode", "cool_setpoint_c", "heat_setpoint_c", "occupied", "indoor_c"
        )
        part.write_csv(folder / f"thermostat_{key // 100:04d}-{key % 100:02d}.csv", float_precision=1)
    return frame.height


def _behavior_parts(world: World, parts: _Parts) -> None:
    """Add the chunk's true behaviour tables; all premises' rows of one 'feeling hot' level come together."""
    p, h = world.params, world.homes
    space = p.state
    states = space.n_states
    hot_levels = (False, True) if p.hidden_confounder else (False,)
    comfort, band = setback_frame(world)
    for hot in hot_levels:
        tables = behavior_tables(space, h.depth_pref, h.keenness, h.restore_lead, comfort, band, hot)
        n, k = len(h.tz), len(ACTIONS)
        cols = {
            "premise_id": np.repeat(h.premise_id, states * k),
            "state_key": np.tile(np.repeat(np.arange(states), k), n),
            "action": np.tile(ACTIONS.astype(np.int8), n * states),
            "probability": tables.reshape(-1),
        }
        if p.hidden_confounder:
            cols["feeling_hot"] = np.full(n * states * k, hot)
        parts.add(f"behavior_{int(hot)}", pl.DataFrame(cols))


def _parameter_rows(world: World) -> pl.DataFrame:
    h = world.homes
    return _heating_rows(
        world,
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
        ),
    )


def _heating_rows(world: World, frame: pl.DataFrame) -> pl.DataFrame:
    """The homes' heating systems beside their other parameters, in the heating season."""
    s = world.heating
    if s is None:
        return frame
    return frame.with_columns(
        heating_system=pl.Series(np.where(s.heat_pump, "heat_pump", "gas_furnace")),
        heating_capacity_kw=s.capacity_kw,
        heat_pump_cop_rated=pl.Series(s.cop_rated, nan_to_null=True),
        balance_point_c=pl.Series(s.balance_c, nan_to_null=True),
        backup_kw=s.backup_kw,
        furnace_efficiency=pl.Series(s.efficiency, nan_to_null=True),
        heating_fan_kw=s.fan_kw,
    )


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
    """Entry for ``thermal-ledger simulate --premises N --seed S --out DIR [--start D --days K]``.

    ``--season winter`` simulates the heating season (``winter_params``); the premises,
    seed, start and days left out are the season's own defaults. Raises
    SimulationError, before anything is written, when the premises, days or
    ``--chunk-premises`` are below one.
    """
    if not isinstance(args, argparse.Namespace):
        parser = argparse.ArgumentParser(prog="thermal-ledger simulate")
        parser.add_argument("--season", choices=SEASONS, default="summer")
        parser.add_argument("--premises", type=int)
        parser.add_argument("--chunk-premises", type=int, default=CHUNK_PREMISES)
        parser.add_argument("--seed", type=int)
        parser.add_argument("--out", required=True)
        parser.add_argument("--start", type=date.fromisoformat)
        parser.add_argument("--days", type=int)
        parser.add_argument("--hidden-confounder", action="store_true")
        parser.add_argument("--manifest", action="store_true")
        parser.add_argument("--policy-values", action="store_true")
        args = parser.parse_args(args)
    hidden = bool(getattr(args, "hidden_confounder", False))
    if getattr(args, "season", "summer") == "winter":
        params = winter_params(hidden_confounder=hidden)
    else:
        params = SimParams(hidden_confounder=hidden)

    def given(name: str):
        value = getattr(args, name, None)
        return getattr(params, {"premises": "n_premises"}.get(name, name)) if value is None else value

    checks = (("--premises", given("premises")), ("--days", given("days")))
    for flag, value in (*checks, ("--chunk-premises", getattr(args, "chunk_premises", CHUNK_PREMISES))):
        if value < 1:
            raise SimulationError(f"{flag} {value}: must be at least 1")
    summary = generate_lake(
        args.out,
        n_premises=given("premises"),
        seed=given("seed"),
        start=given("start"),
        days=given("days"),
        params=params,
        policy_values=bool(getattr(args, "policy_values", False)),
        chunk_premises=getattr(args, "chunk_premises", CHUNK_PREMISES),
    )
    if getattr(args, "manifest", False):
        write_manifest(args.out)
    return summary
