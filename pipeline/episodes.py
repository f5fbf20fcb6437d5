"""The decision process built from the warehouse: hourly grid, away episodes, decision steps.

The heavy lifting is SQL (``sql/hourly.sql``, ``sql/episode.sql``, ``sql/step.sql``);
this module binds the configuration into it and packs each step's features into a
state key with the shared ``StateSpace``.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import duckdb
import polars as pl

from pipeline import store
from pipeline.config import Config

EPISODES_PER_PREMISE = 100_000
"""Episode ids are the premise's number (rank in premise-id order) times this plus the episode's rank."""


@dataclass(frozen=True)
class EpisodeCounts:
    """Row counts of one episode build."""

    hours: int
    episodes: int
    episodes_used: int
    steps: int
    clipped_actions: int
    excluded: dict[str, int]
    mean_decisions: float
    """Mean decisions per used episode (the horizon importance weights multiply over)."""
    weekday_episodes_per_weekday: float
    """Used weekday episodes per premise and observed weekday, averaged over premises with episodes."""


def sql_params(config: Config) -> dict[str, object]:
    """Bound parameters of the hourly, episode and step SQL for ``config``."""
    return {
        "recovery_hours": config.recovery_hours,
        "min_hours": config.min_episode_hours,
        "max_hours": config.max_episode_hours,
        "step_hours": config.step_hours,
        "action_min": min(config.actions),
        "action_max": max(config.actions),
        "penalty_usd": config.comfort_penalty_usd_per_degree_hour,
        "anchored": config.decision_points == "anchored",
        "indoor_basis": config.comfort_penalty_basis == "indoor",
        "schedule_from": config.schedule_away_hours[0],
        "schedule_to": config.schedule_away_hours[1],
        "schedule_max_ratio": config.schedule_max_load_ratio,
        "hold_from": config.setback_hold_hours[0],
        "hold_to": config.setback_hold_hours[1],
        "presence_sources": list(config.presence_sources),
        "episodes_per_premise": EPISODES_PER_PREMISE,
    }


def add_state_keys(steps: pl.DataFrame, config: Config) -> pl.DataFrame:
    """Add ``degrees_c`` and ``state_key`` columns computed from the step features."""
    space = config.state
    heating = (steps["mode"] == "heat").to_numpy()
    degrees = space.degrees(steps["outdoor_c"].to_numpy(), heating)
    keys = space.encode(
        steps["local_hour"].to_numpy(),
        degrees,
        steps["price_tier"].to_numpy(),
        steps["offset_before_c"].to_numpy(),
        steps["steps_left"].to_numpy(),
    )
    return steps.with_columns(pl.Series("degrees_c", degrees), pl.Series("state_key", keys))


def steps_for(con: duckdb.DuckDBPyConnection, config: Config) -> pl.DataFrame:
    """Decision steps of the usable episodes under ``config`` (not stored), with state keys and cohort."""
    steps = store.query(con, "step", sql_params(config)).sort("episode_id", "t")
    cohorts = store.frame(con, "select premise_id, cohort from premise")
    return add_state_keys(steps, config).join(cohorts, on="premise_id", how="left")


def build(con: duckdb.DuckDBPyConnection, config: Config) -> EpisodeCounts:
    """Rebuild ``hourly``, ``episode`` and ``step`` as tables of the warehouse, in one piece.

    The pipeline builds them in shards (``pipeline.shards``); this one-piece build of the
    same SQL is what a shard's files must equal, and what tests of the SQL use.
    """
    params = sql_params(config)
    store.build_table(con, "hourly", params)
    store.build_table(con, "episode", params)
    steps = add_state_keys(store.query(con, "step", params).sort("episode_id", "t"), config)
    store.replace_table(con, "step", steps)
    store.replace_table(con, "state_lookup", config.state.lookup())
    return counts(con)


def counts(con: duckdb.DuckDBPyConnection) -> EpisodeCounts:
    """Row counts of the ``hourly``, ``episode`` and ``step`` the warehouse holds now."""
    rate = store.execute(
        con,
        "with days as (select premise_id,"
        " count(distinct local_date) filter (day_type = 'weekday') as weekdays from hourly group by all),"
        " used as (select premise_id, count(*) as n from episode"
        " where excluded_reason is null and day_type = 'weekday' group by all)"
        " select avg(n / weekdays) from used join days using (premise_id)",
    )[0][0]
    excluded = dict(
        store.execute(
            con,
            "select excluded_reason, count(*) from episode where excluded_reason is not null group by all",
        )
    )
    hours, episodes, used = store.execute(
        con,
        "select (select count(*) from hourly), count(*), count(*) filter (excluded_reason is null)"
        " from episode",
    )[0]
    n_steps, clipped = store.execute(con, "select count(*), count(*) filter (action_clipped) from step")[0]
    return EpisodeCounts(
        hours=hours,
        episodes=episodes,
        episodes_used=used,
        steps=n_steps,
        clipped_actions=int(clipped or 0),
        excluded=excluded,
        mean_decisions=float(n_steps / used) if used else 0.0,
        weekday_episodes_per_weekday=float(rate or 0.0),
    )


def load_steps(con: duckdb.DuckDBPyConnection, table: str = "step") -> pl.DataFrame:
    """All decision steps with their cohort, sorted by (episode_id, t).

    ``table`` is ``step``, or ``step_alternate`` for the steps under the other choice of
    decision points (built beside them by the sharded episode stage).
    """
    name = store.quote_identifier(table)
    # One chunk per column: numpy reads a single chunk in place, several only by copying them,
    # and every estimator call reads these columns.
    return store.frame(
        con, f"select s.*, p.cohort from {name} s join premise p using (premise_id) order by episode_id, t"
    ).rechunk()


def other_choice(config: Config) -> Config:
    """The configuration with the other choice of decision points (for the horizon report)."""
    other = "fixed" if config.decision_points == "anchored" else "anchored"
    return dataclasses.replace(config, decision_points=other)


def load_episodes(con: duckdb.DuckDBPyConnection) -> pl.DataFrame:
    """Every candidate episode with its exclusion reason (null when used)."""
    return store.frame(con, "select * from episode order by episode_id")
