"""The schedule a thermostat is sent: a policy's setpoints in absolute °C, per day type and hour.

A policy is a table over states (local-hour bucket, degree bin, price tier, offset, steps
left), and what a device can follow is a setpoint per day type and local hour. For a premise
and a policy the plan follows the policy's greedy path (its most probable action, the lowest
action on a tie) from the departure state of the premise's usual absence on each day type
(``sql/schedule_absence.sql``: most frequent departure hour, median away hours), with the
decision points the episode stage uses (anchored: the departure, each price-tier rise, one
hour before the return; or every ``step_hours``) and the hour's usual price tier
(``sql/schedule_price_tier.sql``). The outdoor temperature is held in one degree bin per
plan; when the plan differs between bins, one plan per bin is given (``outdoor_band``),
otherwise one plan for any weather (``outdoor_band`` null).

Setpoints are the premise's comfort setpoint of the mode moved by the offset (cooling
raised, heating lowered), clipped to the mode's safety band after every decision, so the
next decision sees the offset actually in force. Hours the residents are home carry the
comfort setpoint itself, which lies within the comfort limits (comfort_heat_c ..
comfort_cool_c) and, as ingest checks, within the safety band. An absence that runs past
midnight is drawn on the same day type's early hours.

All premises and policies are computed together: numpy arrays over plans (premise x policy x
mode x day type x degree bin), one pass over the hours of the longest absence.
"""

from __future__ import annotations

import re
import shutil
from collections.abc import Sequence
from pathlib import Path

import duckdb
import numpy as np
import polars as pl

from pipeline import store
from pipeline.config import Config
from pipeline.policies import PolicyError
from pipeline.rules import Candidate

DAY_TYPES: tuple[str, ...] = ("weekday", "weekend")
HOURS = 24

COLUMNS = [
    "premise_id",
    "rate_plan_id",
    "policy_name",
    "mode",
    "day_type",
    "hour",
    "outdoor_band",
    "outdoor_from_c",
    "outdoor_to_c",
    "price_tier",
    "occupied",
    "offset_c",
    "setpoint_c",
]
"""The schedule table's columns, in order."""

_SCHEMA = {
    "premise_id": pl.Utf8,
    "rate_plan_id": pl.Utf8,
    "policy_name": pl.Utf8,
    "mode": pl.Utf8,
    "day_type": pl.Utf8,
    "hour": pl.Int32,
    "outdoor_band": pl.Int32,
    "outdoor_from_c": pl.Float64,
    "outdoor_to_c": pl.Float64,
    "price_tier": pl.Int32,
    "occupied": pl.Boolean,
    "offset_c": pl.Float64,
    "setpoint_c": pl.Float64,
}


class ScheduleError(PolicyError):
    """Inputs a schedule cannot be made from (a premise's comfort outside its band, an unknown policy)."""


def policy_tables(
    policy: pl.DataFrame, n_states: int, actions: Sequence[int]
) -> dict[tuple[str, str], np.ndarray]:
    """Probability tables (n_states, n_actions) keyed by (policy_name, mode), from a long ``policy`` frame."""
    tables = {}
    ordered = policy.select("policy_name", "mode", "state_key", "action", "probability").sort(
        "policy_name", "mode", "state_key", "action"
    )
    for (name, mode), part in ordered.group_by(["policy_name", "mode"], maintain_order=True):
        if part.height != n_states * len(actions):
            raise ScheduleError(
                f"policy {name!r} ({mode}): {part.height} rows, expected {n_states * len(actions)}"
            )
        tables[(str(name), str(mode))] = part["probability"].to_numpy().reshape(n_states, len(actions))
    return tables


def _check_comfort(premises: pl.DataFrame, config: Config) -> None:
    """Every premise's comfort setpoints inside their bands and heat <= cool (what ingest enforces)."""
    cool, heat = premises["comfort_cool_c"].to_numpy(), premises["comfort_heat_c"].to_numpy()
    (cool_low, cool_high), (heat_low, heat_high) = config.cool_band_c, config.heat_band_c
    bad = (cool < cool_low) | (cool > cool_high) | (heat < heat_low) | (heat > heat_high) | (heat > cool)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ScheduleError(
            f"premise {premises['premise_id'][i]}: comfort {heat[i]} .. {cool[i]} °C is not inside the safety"
            f" bands (heating {heat_low} .. {heat_high}, cooling {cool_low} .. {cool_high} °C) with heating"
            " at or below cooling; no schedule can keep both (ingest refuses such premises)"
        )


def setpoint_plans(
    plans: pl.DataFrame,
    absences: pl.DataFrame,
    tiers: pl.DataFrame,
    tables: dict[tuple[str, str], np.ndarray],
    config: Config,
) -> pl.DataFrame:
    """The setpoint plan of each (premise, policy, mode): per day type, local hour and, if it matters, band.

    Parameters
    ----------
    plans : polars.DataFrame
        premise_id, policy_name, mode ('cool' or 'heat'), comfort_cool_c, comfort_heat_c (°C)
        and optionally rate_plan_id: one row per premise, policy and mode to plan.
    absences : polars.DataFrame
        premise_id, mode, day_type, depart_hour (local), away_hours: the usual absence; a
        day type without a row is a day at home (comfort all day).
    tiers : polars.DataFrame
        premise_id, day_type, local_hour, price_tier: the usual tier (0 where missing).
    tables : dict
        (policy_name, mode) -> probability table (n_states, n_actions).

    Returns
    -------
    polars.DataFrame
        ``COLUMNS``: hour 0..23, setpoint_c (°C) and offset_c (°C in the setback direction),
        occupied, the hour's price tier, and outdoor_band (degree bin, null: any weather) with
        its outdoor range outdoor_from_c .. outdoor_to_c (°C, null: unbounded).
    """
    space = config.state
    if "rate_plan_id" not in plans.columns:
        plans = plans.with_columns(pl.lit(None, dtype=pl.Utf8).alias("rate_plan_id"))
    _check_comfort(plans, config)
    keys = list(tables)
    index = pl.DataFrame(
        {"policy_name": [k[0] for k in keys], "mode": [k[1] for k in keys], "table": range(len(keys))},
        schema={"policy_name": pl.Utf8, "mode": pl.Utf8, "table": pl.Int64},
    )
    base = (
        plans.with_columns(pl.col("premise_id").cast(pl.Utf8), pl.col("policy_name").cast(pl.Utf8))
        .join(index, on=["policy_name", "mode"], how="left")
        .join(pl.DataFrame({"day_type": list(DAY_TYPES)}), how="cross")
        .join(
            absences.select(
                pl.col("premise_id").cast(pl.Utf8), "mode", "day_type", "depart_hour", "away_hours"
            ),
            on=["premise_id", "mode", "day_type"],
            how="left",
        )
        .sort("premise_id", "policy_name", "mode", "day_type")
    )
    missing = base.filter(pl.col("table").is_null())
    if missing.height:
        row = missing.row(0, named=True)
        raise ScheduleError(
            f"premise {row['premise_id']}: no table for policy {row['policy_name']!r} in mode {row['mode']}"
        )
    if base.height == 0:
        return pl.DataFrame(schema=_SCHEMA)
    n_bands = len(space.degree_bin_edges_c) + 1
    # A table whose greedy action never depends on the degree bin gives one plan for any weather;
    # the others are followed in every bin, and kept per bin where the paths differ.
    greedy = np.stack([np.argmax(tables[k], axis=1) for k in keys])  # (n_tables, n_states)
    by_bin = greedy.reshape(len(keys), space.sizes[0], n_bands, -1)
    weather = (by_bin != by_bin[:, :, :1]).any(axis=(1, 2, 3))
    table = base["table"].to_numpy()
    bands_of = np.where(weather[table], n_bands, 1)
    group_of = np.repeat(np.arange(base.height), bands_of)
    band = np.arange(group_of.size) - np.repeat(np.cumsum(bands_of) - bands_of, bands_of)
    setpoint, offset, occupied, tier = _greedy_paths(base, tiers, greedy, group_of, band, config)
    depends = np.zeros(base.height, dtype=bool)
    many = np.flatnonzero(bands_of > 1)
    if many.size:
        blocks = setpoint[np.isin(group_of, many)].reshape(many.size, n_bands, HOURS)
        depends[many] = (blocks != blocks[:, :1]).any(axis=(1, 2))
    plan = np.flatnonzero(depends[group_of] | (band == 0))  # every bin of a dependent group, else one
    group_of, band = group_of[plan], band[plan]
    edges = np.asarray(space.degree_bin_edges_c, dtype=float)
    lower = np.r_[np.nan, edges][band]
    upper = np.r_[edges, np.nan][band]
    heat = (base["mode"].to_numpy() == "heat")[group_of]
    base_c = space.degree_base_c
    from_c = np.where(heat, base_c - upper, base_c + lower)
    to_c = np.where(heat, base_c - lower, base_c + upper)
    shown_band = np.where(depends[group_of], band, -1)
    rows = len(plan) * HOURS
    out = base.select("premise_id", "rate_plan_id", "policy_name", "mode", "day_type")[
        np.repeat(group_of, HOURS)
    ]
    any_band = np.repeat(shown_band < 0, HOURS)
    return (
        out.with_columns(
            pl.Series("hour", np.tile(np.arange(HOURS, dtype=np.int32), len(plan))),
            pl.Series("outdoor_band", np.repeat(shown_band, HOURS).astype(np.int32)),
            pl.Series("outdoor_from_c", np.where(any_band, np.nan, np.repeat(from_c, HOURS))),
            pl.Series("outdoor_to_c", np.where(any_band, np.nan, np.repeat(to_c, HOURS))),
            pl.Series("price_tier", tier[plan].reshape(rows).astype(np.int32)),
            pl.Series("occupied", occupied[plan].reshape(rows)),
            pl.Series("offset_c", offset[plan].reshape(rows)),
            pl.Series("setpoint_c", setpoint[plan].reshape(rows)),
        )
        .with_columns(
            pl.when(pl.col("outdoor_band") >= 0).then(pl.col("outdoor_band")).alias("outdoor_band"),
            pl.col("outdoor_from_c").fill_nan(None),
            pl.col("outdoor_to_c").fill_nan(None),
        )
        .select(COLUMNS)
        .cast(_SCHEMA)
    )


def _tier_matrix(base: pl.DataFrame, tiers: pl.DataFrame) -> np.ndarray:
    """(n_groups, 24) usual price tier of each group's premise and day type (0 where unknown)."""
    pairs = base.select("premise_id", "day_type").unique(maintain_order=True).with_row_index("pair")
    matrix = np.zeros((pairs.height, HOURS), dtype=np.int64)
    known = tiers.select(pl.col("premise_id").cast(pl.Utf8), "day_type", "local_hour", "price_tier").join(
        pairs, on=["premise_id", "day_type"]
    )
    matrix[known["pair"].to_numpy(), known["local_hour"].to_numpy()] = known["price_tier"].to_numpy()
    return matrix[
        base.join(pairs, on=["premise_id", "day_type"], how="left", maintain_order="left")["pair"].to_numpy()
    ]


def _greedy_paths(
    base: pl.DataFrame,
    tiers: pl.DataFrame,
    greedy: np.ndarray,
    group_of: np.ndarray,
    band: np.ndarray,
    config: Config,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Setpoint, offset, occupied and tier (n_plans, 24) by local hour; plan i is group_of[i] in band[i].

    ``greedy`` (n_tables, n_states) holds each table's most probable action column.
    """
    space, actions = config.state, np.asarray(config.actions, dtype=np.int64)
    table = base["table"].to_numpy()[group_of]
    heating = base["mode"].to_numpy() == "heat"
    comfort = np.where(heating, base["comfort_heat_c"], base["comfort_cool_c"])[group_of]
    heat = heating[group_of]
    sign = np.where(heat, -1.0, 1.0)
    low = np.where(heat, config.heat_band_c[0], config.cool_band_c[0])
    high = np.where(heat, config.heat_band_c[1], config.cool_band_c[1])
    depart = base["depart_hour"].fill_null(0).to_numpy().astype(np.int64)[group_of]
    away = np.minimum(base["away_hours"].fill_null(0).to_numpy().astype(np.int64), HOURS)[group_of]
    degrees = np.r_[0.0, np.asarray(space.degree_bin_edges_c, dtype=float)][band]
    tier_by_hour = _tier_matrix(base, tiers)[group_of]  # (n_plans, 24)
    n_plans = table.shape[0]
    rows = np.arange(n_plans)

    # Decision points over the hours of each absence, as sql/step.sql places them.
    h = np.arange(HOURS)[None, :]
    local = (depart[:, None] + h) % HOURS
    in_absence = h < away[:, None]
    tier = tier_by_hour[rows[:, None], local]
    previous = tier_by_hour[rows[:, None], (local - 1) % HOURS]
    if config.decision_points == "anchored":
        decision = (h == 0) | (h == away[:, None] - 1) | ((h > 0) & (tier > previous))
    else:
        decision = h % config.step_hours == 0
    decision = decision & in_absence
    step = np.cumsum(decision, axis=1, dtype=np.int32) - 1
    steps_left = decision.sum(axis=1)[:, None] - step

    setpoint = np.repeat(comfort[:, None], HOURS, axis=1)
    offset_by_hour = np.zeros((n_plans, HOURS))
    offset = np.zeros(n_plans)
    for hour in range(int(away.max(initial=0))):
        decide = decision[:, hour]
        key = space.encode(local[:, hour], degrees, tier[:, hour], offset, np.maximum(steps_left[:, hour], 1))
        moved = offset + actions[greedy[table, key]]
        target = np.clip(comfort + sign * moved, low, high)
        offset = np.where(decide, sign * (target - comfort), offset)
        here = in_absence[:, hour]
        cells = (rows[here], local[here, hour])
        setpoint[cells] = comfort[here] + sign[here] * offset[here]
        offset_by_hour[cells] = offset[here]
    occupied = np.ones((n_plans, HOURS), dtype=bool)
    occupied[rows[:, None].repeat(HOURS, 1)[in_absence], local[in_absence]] = False
    return setpoint, offset_by_hour, occupied, tier_by_hour


# ---- in the pipeline ---------------------------------------------------------------------------


def assignments_for(
    recommendation: pl.DataFrame | None, candidates: Sequence[Candidate], premises: pl.DataFrame
) -> pl.DataFrame:
    """Which policy to plan for which premise: premise_id, policy_name.

    With a ``recommendation`` (premise_id, policy, decision), the premises whose decision is
    'send', with the policy named; without one, every premise with every candidate that
    applies to it (``premises``: premise_id, cohort, rate_plan_id).
    """
    if recommendation is not None:
        return (
            recommendation.filter((pl.col("decision") == "send") & pl.col("policy").is_not_null())
            .select(pl.col("premise_id").cast(pl.Utf8), pl.col("policy").cast(pl.Utf8).alias("policy_name"))
            .unique(maintain_order=True)
        )
    ids = premises["premise_id"].cast(pl.Utf8)
    parts = [
        pl.DataFrame({"premise_id": ids.filter(pl.Series(c.applies(premises))), "policy_name": c.name})
        for c in candidates
    ]
    return pl.concat(parts) if parts else pl.DataFrame(schema={"premise_id": pl.Utf8, "policy_name": pl.Utf8})


def for_run(
    con: duckdb.DuckDBPyConnection,
    config: Config,
    candidates: Sequence[Candidate],
    policy: pl.DataFrame,
    recommendation: pl.DataFrame | None = None,
) -> pl.DataFrame:
    """The run's schedule table from the warehouse (episodes, hourly tiers, premises) and its policies.

    ``policy`` holds the tables of every policy that may be planned (candidates and learned
    ones, long form). With ``schedule_for = 'every_candidate'`` the recommendation is not read.
    """
    premise = store.frame(
        con,
        "select premise_id, cohort, rate_plan_id, comfort_cool_c, comfort_heat_c from premise order by all",
    )
    absences = store.query(con, "schedule_absence")
    # Each premise is planned in the modes of its usable episodes.
    modes = absences.select("premise_id", "mode").unique()
    premises = premise.join(modes, on="premise_id")
    tiers = store.query(con, "schedule_price_tier")
    if config.schedule_for == "every_candidate":
        recommendation = None
    assignments = assignments_for(recommendation, candidates, premise)
    tables = policy_tables(policy, config.state.n_states, config.actions)
    # A policy evaluated in one mode only is planned for that mode only.
    known = pl.DataFrame(
        {"policy_name": [k[0] for k in tables], "mode": [k[1] for k in tables]},
        schema={"policy_name": pl.Utf8, "mode": pl.Utf8},
    )
    unknown = assignments.join(known, on="policy_name", how="anti")
    if unknown.height:
        row = unknown.row(0, named=True)
        raise ScheduleError(
            f"premise {row['premise_id']}: policy {row['policy_name']!r} is to be sent but the evaluation"
            " has no table for it (its policy frame lists the policies it can plan)"
        )
    plans = premises.join(assignments, on="premise_id").join(known, on=["policy_name", "mode"])
    return setpoint_plans(plans, absences, tiers, tables, config)


def _file_name(program: str | None) -> str:
    return re.sub(r"[^A-Za-z0-9._-]", "_", program or "no-rate-plan") + ".csv"


def learned_policy(con: duckdb.DuckDBPyConnection) -> pl.DataFrame | None:
    """The learned policies' tables (the improve stage's ``improvement_policy``), None when absent."""
    present = store.execute(
        con, "select count(*) from duckdb_tables() where table_name = 'improvement_policy'"
    )
    if not present[0][0]:
        return None
    return store.frame(
        con, "select policy_name, mode, state_key, action, probability from improvement_policy"
    )


def programs(con: duckdb.DuckDBPyConnection) -> list[str]:
    """The rate plans of the enrolled premises: one schedule file each, even with nothing to send."""
    return [row[0] for row in store.execute(con, "select distinct rate_plan_id from premise order by 1")]


def write_program_files(schedule: pl.DataFrame, folder: Path, programs: Sequence[str] = ()) -> list[Path]:
    """One CSV per program (the premises of one rate plan) for operations teams; return the paths.

    Every program in ``programs`` gets a file, with the header only when none of its premises
    has a plan (nothing to send). The files are written into a sibling folder that is renamed
    to ``folder`` when all are whole, so a reader never sees part of a run's files.
    """
    scratch = folder.with_name(folder.name + ".tmp")
    if scratch.exists():
        shutil.rmtree(scratch)
    scratch.mkdir(parents=True)
    names = []
    order = ["rate_plan_id", "premise_id", "policy_name", "mode", "day_type", "outdoor_band", "hour"]
    for (program,), part in schedule.sort(order, nulls_last=False).group_by(
        ["rate_plan_id"], maintain_order=True
    ):
        name = _file_name(program)
        part.drop("rate_plan_id").write_csv(scratch / name)
        store.fault_point("schedule-file-write")
        names.append(name)
    for program in programs:
        name = _file_name(program)
        if name not in names:
            schedule.drop("rate_plan_id").clear().write_csv(scratch / name)
            names.append(name)
    if folder.exists():
        shutil.rmtree(folder)
    scratch.rename(folder)
    return [folder / name for name in names]
