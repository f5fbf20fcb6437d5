"""On-policy roll-outs of any policy on a lake's exogenous draws, for the true value of a policy."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import polars as pl

from pipeline.policies import SetbackRule, validate_table
from pipeline.simulate.behavior import ACTIONS
from pipeline.simulate.engine import (
    away_setpoints,
    behavior_chooser,
    episode_frame,
    find_episodes,
    roll,
    run_grid,
    table_chooser,
)
from pipeline.simulate.params import SimParams, SimulationError
from pipeline.simulate.world import World, build_world

CANDIDATES: tuple[SetbackRule, ...] = (
    SetbackRule("setback-1", depth_c=1, lead_steps=0),
    SetbackRule("setback-2", depth_c=2, lead_steps=0),
    SetbackRule("setback-2-early", depth_c=2, lead_steps=1),
)
"""The pipeline's default candidate rules, whose true values the sample lake records."""


def simulate_policy(
    policy_probs: np.ndarray | str,
    params: SimParams | None = None,
    premise_ids: list[str] | None = None,
    choice_stream: int = 0,
    **overrides,
) -> pl.DataFrame:
    """Roll a policy out on-policy; one row per away episode with its true return.

    Parameters
    ----------
    policy_probs : ndarray (n_states, n_actions) or (n_premises, n_states, n_actions), or "behavior"
        Action probabilities per state key (actions ``DEFAULT_ACTIONS``, -2 .. +2 °C). Actions that
        would leave the safety band are dropped and the row renormalised, as the
        thermostat would refuse them. "behavior" uses the residents' own model.
    params : SimParams
        The lake's parameters (same seed, premises and days as ``generate_lake``);
        keyword ``overrides`` (e.g. ``n_premises=60, seed=7``) replace fields.
    premise_ids : list of str, optional
        Keep only these premises in the result (all homes are still simulated,
        so the draws match the lake's).
    choice_stream : int
        Which stream of the residents' random choices to use; 0 is the stream
        the lake was logged with, so rolling out ``"behavior"`` on stream 0
        reproduces the logged episodes exactly.

    Returns
    -------
    polars.DataFrame
        premise_id, episode_start (UTC), n_steps (decisions), away_hours, return_usd, kwh,
        comfort_penalty_usd, final_offset_c, presence_sensing (whether the
        pipeline can see the episode at all).
    """
    params = replace(params or SimParams(), **overrides)
    out = _simulate(build_world(params), policy_probs, choice_stream)
    if premise_ids is not None:
        out = out.filter(pl.col("premise_id").is_in(list(premise_ids)))
    return out


def _simulate(world: World, policy_probs: np.ndarray | str, choice_stream: int) -> pl.DataFrame:
    params = world.params
    if isinstance(policy_probs, str):
        if policy_probs != "behavior":
            raise SimulationError(f"unknown policy {policy_probs!r}; pass a table or 'behavior'")
        chooser = behavior_chooser(world)
    else:
        probs = np.asarray(policy_probs, dtype=float)
        n_homes = len(world.homes.index)
        per_home_ok = probs.ndim == 2 or (probs.ndim == 3 and probs.shape[0] == n_homes)
        if probs.shape[-2:] != (params.state.n_states, len(ACTIONS)) or not per_home_ok:
            raise SimulationError(
                f"policy table shape {probs.shape} does not fit {params.state.n_states} states,"
                f" {len(ACTIONS)} actions {tuple(ACTIONS.tolist())} and {n_homes} premises"
            )
        validate_table(probs.reshape(-1, len(ACTIONS)), probs.size // len(ACTIONS), len(ACTIONS))
        chooser = table_chooser(world, probs)
    episodes = find_episodes(world)
    rollout = roll(world, episodes, chooser, choice_stream)
    run = run_grid(world, away_setpoints(world, episodes, rollout))
    return episode_frame(world, episodes, rollout, run)


def true_values(
    params: SimParams,
    rules: tuple[SetbackRule, ...] = CANDIDATES,
    epsilons: tuple[float, ...] = (0.0, 0.05),
    world: World | None = None,
) -> pl.DataFrame:
    """True per-episode value of each rule (and of the residents' own behaviour) on the lake's draws.

    Only episodes the pipeline can see (homes with presence sensing) count.
    One row per policy, epsilon and premise, plus a portfolio row with a null
    premise_id: n_episodes, value_usd (mean return), kwh and comfort penalty
    per episode. Epsilon-soft rules draw their choices from stream 1, so they
    are independent of the logged choices (stream 0).
    """
    return summarise_runs(policy_runs(world or build_world(params), rules, epsilons))


def policy_runs(
    world: World,
    rules: tuple[SetbackRule, ...] = CANDIDATES,
    epsilons: tuple[float, ...] = (0.0, 0.05),
) -> list[tuple[str, float, pl.DataFrame]]:
    """Roll the behaviour and each rule out on ``world``; the visible episodes of each, in premise order.

    Runs of consecutive slices of a lake's premises, concatenated in order,
    are the runs of the whole lake (see ``summarise_runs``).
    """
    params = world.params
    runs = [("behavior", 0.0, _simulate(world, "behavior", 0))]
    for rule in rules:
        for eps in epsilons:
            table = rule.table(params.state, epsilon=eps)
            runs.append((rule.name, eps, _simulate(world, table, 1 if eps > 0 else 0)))
    columns = ["premise_id", "return_usd", "kwh", "comfort_penalty_usd"]
    return [(name, eps, run.filter(pl.col("presence_sensing")).select(columns)) for name, eps, run in runs]


def summarise_runs(runs: list[tuple[str, float, pl.DataFrame]]) -> pl.DataFrame:
    """Per policy and epsilon: a portfolio row and one row per premise of the mean return, kWh and penalty."""
    frames = []
    for name, eps, seen in runs:
        ids = seen["premise_id"].to_numpy()
        # a premise's episodes are contiguous (premise order), so each premise is one slice
        premises, first, count = np.unique(ids, return_index=True, return_counts=True)
        slices = [slice(0, len(ids))] + [slice(f, f + c) for f, c in zip(first, count, strict=True)]
        groups = [None, *premises.tolist()]
        values = {col: seen[col].to_numpy() for col in ("return_usd", "kwh", "comfort_penalty_usd")}
        # numpy means in a fixed order, so the file's bytes do not depend on thread scheduling
        frames.append(
            pl.DataFrame(
                {
                    "policy_name": [name] * len(groups),
                    "epsilon": [eps] * len(groups),
                    "premise_id": pl.Series(groups, dtype=pl.String),
                    "n_episodes": [sl.stop - sl.start for sl in slices],
                    **{
                        out: [float(np.mean(values[col][sl])) for sl in slices]
                        for out, col in (
                            ("value_usd", "return_usd"),
                            ("kwh", "kwh"),
                            ("comfort_penalty_usd", "comfort_penalty_usd"),
                        )
                    },
                }
            )
        )
    cols = ["policy_name", "epsilon", "premise_id", "n_episodes", "value_usd", "kwh", "comfort_penalty_usd"]
    return pl.concat(frames).select(cols)
